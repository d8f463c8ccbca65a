"""Small presets that train in a second or two, for the tests of faults, files and processes."""

from __future__ import annotations

import tomllib

from core.scenario import Scenario, parse_scenario

# Two batch sizes x (none + 2 methods x 4 thresholds) x 6 seeds = 108 members in 6 chunks: enough
# chunks for a kill to land before, inside or between them, each trained in a fraction of a second.
TINY_MAP = """\
schema = 2
name = "Tiny map"

[data]
task = "linear"
dim = 4
n_train = 512
n_val = 128
noise = 0.5

[outliers]
kind = "target-shift"
rate = 0.5
scale = 20.0

[model]
kind = "linear"

[train]
steps = {steps}
lr = 0.02
eval_every = 10

[[clip]]
method = "none"

[[clip]]
method = "global-norm"

[[clip]]
method = "example-norm"

[map]
batch_sizes = [8, 32]
seeds = [0, 1, 2, 3, 4, 5]
thresholds = {{min = 0.01, max = 10.0, count = 4}}
"""

# A fan of 3 methods (35 members) at 4 batch sizes, 40 steps: a few seconds in one worker.
TINY_FAN = """\
schema = 2
name = "Tiny fan"

[data]
task = "linear"
dim = 3
n_train = 256
n_val = 64

[outliers]
kind = "target-shift"
rate = 0.3
scale = 10.0

[model]
kind = "linear"

[train]
steps = 40
batch_size = 8
eval_every = 10
lr = 0.05

[[clip]]
method = "none"

[[clip]]
method = "global-norm"
threshold = 1.0

[[clip]]
method = "example-norm"
threshold = 1.0
"""


def tiny_map_text(steps: int = 60) -> str:
    return TINY_MAP.format(steps=steps)


def tiny_map(steps: int = 60) -> Scenario:
    return parse_scenario(tomllib.loads(tiny_map_text(steps)))


def tiny_fan() -> Scenario:
    return parse_scenario(tomllib.loads(TINY_FAN))


def study_text(*entries: tuple[str, str, str]) -> str:
    """A study of (kind, title, preset file) entries."""
    parts = ['schema = 2\ntitle = "Faults"\n']
    for kind, title, preset in entries:
        parts.append(f'[[entry]]\nkind = "{kind}"\ntitle = "{title}"\npreset = "{preset}"\n')
    return "\n".join(parts)
