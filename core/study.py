"""The study: a titled, ordered list of entry models (notes, fans, maps), with no Qt.

Views subscribe to it as they do to entries; edits (and their undos) call `insert`, `remove`,
`move` and `set_title`, and the study says what changed. It knows whether it differs from its
file, loads and saves through core.study_file, restores finished results from the cache beside
its file and stores new ones there, and answers which entries still need training.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from pathlib import Path

from core import cache
from core.entry_model import TRAINING, EntryModel, NoteModel, TrainedEntry, WorkedEntry
from core.fan_model import FanModel
from core.log_model import LogModel
from core.map_model import MapModel
from core.study_file import EntryRecord, StudyFile, dumps_study, load_study, save_study

UNTITLED = "Untitled study"
SAME_PATH = object()  # Study.from_file: at the file's own path
# Entry changes that change the file; the others ("status", "data") only change results.
FILE_CHANGES = ("title", "text", "scenario")


@dataclass(frozen=True)
class StudyEvent:
    """What changed: "inserted", "removed", "moved" (entry, index: where it is now), "title",
    "path", "modified", "entry" (an entry's own change in `detail`) or "notice" (text in
    `detail`)."""

    what: str
    entry: EntryModel | None = None
    index: int = -1
    detail: str = ""


StudyListener = Callable[[StudyEvent], None]


def entry_from_record(record: EntryRecord) -> EntryModel:
    """A fresh model for one entry of a file."""
    if record.kind == "note":
        return NoteModel(record.title, record.text, origin=record)
    if record.kind == "log":
        if record.log is None:
            raise ValueError(f"the log entry {record.title!r} has no log")
        return LogModel(record.title, record.log, origin=record)
    if record.scenario is None:
        raise ValueError(f"the {record.kind} entry {record.title!r} has no scenario")
    if record.kind == "fan":
        return FanModel(record.title, record.scenario, origin=record)
    if record.kind == "map":
        return MapModel(record.title, record.scenario, origin=record)
    raise ValueError(f"no entry model for kind {record.kind!r}")


def record_of(entry: EntryModel) -> EntryRecord:
    """An entry as its file would hold it now."""
    if isinstance(entry, NoteModel):
        return EntryRecord("note", entry.title, text=entry.text)
    if isinstance(entry, LogModel):
        return EntryRecord("log", entry.title, log=entry.source)
    origin: EntryRecord | None = entry.origin
    if isinstance(entry, FanModel | MapModel):
        if origin is not None and origin.kind == entry.kind:
            return dataclasses.replace(origin, title=entry.title, scenario=entry.scenario)
        return EntryRecord(entry.kind, entry.title, scenario=entry.scenario)
    raise ValueError(f"no file form for {type(entry).__name__}")


class Study:
    """A study document. Entries are listened to, so the study knows when it was edited."""

    def __init__(
        self,
        title: str = UNTITLED,
        entries: Sequence[EntryModel] = (),
        path: Path | None = None,
        notices: Sequence[str] = (),
    ) -> None:
        self.title = title
        self._entries: list[EntryModel] = []
        self._path = path
        self._listeners: list[StudyListener] = []
        self._entry_listeners: dict[int, Callable[[str], None]] = {}
        self.notices: list[str] = list(notices)
        self.file_notices = tuple(notices)  # from reading the file (notes), not about results
        for entry in entries:
            self._attach(entry, len(self._entries))
        self._saved_text = self.text() if path is not None or not entries else ""
        self._modified = self.text() != self._saved_text

    # -- files --------------------------------------------------------------------------------

    @classmethod
    def from_file(cls, study_file: StudyFile, path: Path | object | None = SAME_PATH) -> Study:
        """A study of what `study_file` holds, at the file's own path unless `path` says another
        (None: a study never saved, such as the recovery copy of one)."""
        where = study_file.path if path is SAME_PATH else path
        study = cls(
            study_file.title,
            [entry_from_record(e) for e in study_file.entries],
            where if isinstance(where, Path) else None,
            study_file.notices,
        )
        study.restore_cached()
        return study

    @classmethod
    def open(cls, path: Path) -> Study:
        """The study saved at `path` (raises GradfenceInputError for a bad file)."""
        return cls.from_file(load_study(path), path)

    def to_file(self) -> StudyFile:
        return StudyFile(self.title, tuple(record_of(e) for e in self._entries), self._path)

    def text(self) -> str:
        """The study as its file would be written now."""
        return dumps_study(self.to_file(), self.folder())

    def folder(self) -> Path:
        return self._path.resolve().parent if self._path is not None else Path.cwd()

    @property
    def path(self) -> Path | None:
        return self._path

    def save(self, path: Path | None = None) -> None:
        """Write the study atomically (to `path`, which becomes its file); raises OSError."""
        target = path or self._path
        if target is None:
            raise ValueError("a study that was never saved needs a path")
        moved = target != self._path
        self._path = target
        try:
            save_study(self.to_file(), target)
        except BaseException:
            if moved:
                self._path = None if path is None else self._path
            raise
        self._saved_text = self.text()
        self._update_modified()
        if moved:
            self._emit(StudyEvent("path"))
        for entry in self.trained_entries:
            self.store_cached(entry)

    def mark_unsaved(self, saved_text: str) -> None:
        """The file holds `saved_text` while the study holds more (a restored recovery copy)."""
        self._saved_text = saved_text
        self._update_modified()

    @property
    def modified(self) -> bool:
        return self._modified

    def _update_modified(self) -> None:
        modified = self.text() != self._saved_text
        if modified != self._modified:
            self._modified = modified
            self._emit(StudyEvent("modified"))

    # -- entries ------------------------------------------------------------------------------

    @property
    def entries(self) -> tuple[EntryModel, ...]:
        return tuple(self._entries)

    def __iter__(self) -> Iterator[EntryModel]:
        return iter(list(self._entries))

    def __len__(self) -> int:
        return len(self._entries)

    def index(self, entry: EntryModel) -> int:
        return next(i for i, e in enumerate(self._entries) if e is entry)

    @property
    def trained_entries(self) -> list[TrainedEntry]:
        """The fans and maps."""
        return [e for e in self._entries if isinstance(e, FanModel | MapModel)]

    @property
    def workable(self) -> list[WorkedEntry]:
        """Every entry whose results take work: fans, maps and logs."""
        return [e for e in self._entries if isinstance(e, FanModel | MapModel | LogModel)]

    def insert(self, index: int, entry: EntryModel) -> None:
        index = max(0, min(index, len(self._entries)))
        self._attach(entry, index)
        self.restore_cached(entry)
        self._emit(StudyEvent("inserted", entry, index))
        self._update_modified()

    def remove(self, entry: EntryModel) -> int:
        """Take `entry` out (kept intact, so an undo can put it back); returns where it was."""
        index = self.index(entry)
        del self._entries[index]
        entry.unsubscribe(self._listener_for(entry))
        self._emit(StudyEvent("removed", entry, index))
        self._update_modified()
        return index

    def move(self, entry: EntryModel, index: int) -> None:
        start = self.index(entry)
        index = max(0, min(index, len(self._entries) - 1))
        if index == start:
            return
        del self._entries[start]
        self._entries.insert(index, entry)
        self._emit(StudyEvent("moved", entry, index))
        self._update_modified()

    def set_title(self, title: str) -> None:
        if title != self.title:
            self.title = title
            self._emit(StudyEvent("title"))
            self._update_modified()

    def pending(self) -> list[WorkedEntry]:
        """The entries without finished results of what they hold now."""
        return [e for e in self.workable if not e.has_current_results() and e.status != TRAINING]

    # -- listening ----------------------------------------------------------------------------

    def subscribe(self, listener: StudyListener) -> None:
        self._listeners.append(listener)

    def unsubscribe(self, listener: StudyListener) -> None:
        if listener in self._listeners:
            self._listeners.remove(listener)

    def _emit(self, event: StudyEvent) -> None:
        for listener in list(self._listeners):
            listener(event)

    def notify(self, text: str) -> None:
        """A one-line notice for whoever shows the study (a cache file set aside, say)."""
        self.notices.append(text)
        self._emit(StudyEvent("notice", detail=text))

    def _attach(self, entry: EntryModel, index: int) -> None:
        self._entries.insert(index, entry)
        entry.subscribe(self._listener_for(entry))

    def _listener_for(self, entry: EntryModel) -> Callable[[str], None]:
        """One listener per entry, the same each time, so that it can be unsubscribed."""
        key = id(entry)
        if key not in self._entry_listeners:
            self._entry_listeners[key] = lambda what: self._on_entry_changed(entry, what)
        return self._entry_listeners[key]

    def _on_entry_changed(self, entry: EntryModel, what: str) -> None:
        if what == "scenario" and isinstance(entry, FanModel | MapModel):
            self.restore_cached(entry)
        elif what == "status" and isinstance(entry, FanModel | MapModel):
            self.store_cached(entry)
        self._emit(StudyEvent("entry", entry, detail=what))
        if what in FILE_CHANGES:
            self._update_modified()

    # -- the results cache --------------------------------------------------------------------

    def cache_folder(self) -> Path | None:
        return cache.cache_dir(self._path) if self._path is not None else None

    def restore_cached(self, entry: EntryModel | None = None) -> None:
        """Show cached results of the current scenarios (of one entry, or of all)."""
        folder = self.cache_folder()
        if folder is None:
            return
        for e in [entry] if entry is not None else list(self._entries):
            if not isinstance(e, FanModel | MapModel) or e.status == TRAINING:
                continue
            if e.has_current_results():
                continue
            found = cache.load(folder, e)
            if found.notice:
                self.notify(found.notice)

    def store_cached(self, entry: TrainedEntry) -> None:
        folder = self.cache_folder()
        if folder is None or not isinstance(entry, FanModel | MapModel):
            return
        try:
            cache.store(folder, entry)
        except OSError as exc:  # a read-only folder costs the cache, nothing else
            self.notify(f"results of {entry.title!r} not cached in {folder}: {exc.strerror}.")
