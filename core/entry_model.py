"""What every entry model of a study shares: listeners, states in plain words, and the note.

No Qt: a view subscribes with a callback and changes its entry by calling the entry's methods.
Listeners are called with what changed: "title", "text", "scenario", "status" or "data".
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any, Protocol

from core.scenario import Scenario

if TYPE_CHECKING:
    from core.study_file import EntryRecord

# The states of an entry that trains, the same words for every kind.
NOT_TRAINED = "not trained"
TRAINING = "training"
TRAINED = "trained"
STOPPED = "stopped"
FAILED = "failed"
EDITED = "edited since these results"  # a trained entry whose scenario changed since

Listener = Callable[[str], None]


class Observable:
    """The subscribe style every model uses."""

    _listeners: list[Listener]
    title: str

    def subscribe(self, listener: Listener) -> None:
        self._listeners.append(listener)

    def unsubscribe(self, listener: Listener) -> None:
        if listener in self._listeners:
            self._listeners.remove(listener)

    def _emit(self, what: str) -> None:
        for listener in list(self._listeners):
            listener(what)

    def set_title(self, title: str) -> None:
        if title != self.title:
            self.title = title
            self._emit("title")


class EntryModel(Protocol):
    """What a study asks of every entry."""

    kind: str
    title: str
    origin: EntryRecord | None  # how the entry was written in its file, to write it back so

    def subscribe(self, listener: Listener) -> None: ...

    def unsubscribe(self, listener: Listener) -> None: ...

    def set_title(self, title: str) -> None: ...


class WorkedEntry(EntryModel, Protocol):
    """An entry whose results take work in a worker: a fan, a map or a log."""

    status: str
    run_id: int

    @property
    def edited(self) -> bool: ...

    def has_current_results(self) -> bool: ...

    def progress(self) -> float: ...

    def progress_text(self) -> str: ...

    def stop(self) -> None: ...

    def fail(self, run_id: int, message: str) -> None: ...

    def state_text(self) -> str: ...


class TrainedEntry(WorkedEntry, Protocol):
    """An entry whose results come from training a scenario: a fan or a map."""

    scenario: Scenario
    results_hash: str

    def set_scenario(self, scenario: Scenario) -> None: ...


def state_words(status: str, edited: bool, error: str = "") -> str:
    """The state of an entry in plain words."""
    if status == FAILED:
        last = error.strip().splitlines()[-1] if error.strip() else ""
        return f"{FAILED}: {last}" if last else FAILED
    if edited and status != TRAINING:
        return EDITED
    return status


@dataclass
class NoteModel(Observable):
    """A note entry: a title and Markdown text."""

    title: str
    text: str = ""
    origin: Any = None
    kind: str = "note"
    _listeners: list[Listener] = field(default_factory=list, repr=False)

    def set_text(self, text: str) -> None:
        if text != self.text:
            self.text = text
            self._emit("text")
