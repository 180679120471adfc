"""The automatic daily log: watch a folder and ingest each shot-table file once it is complete.

A file is taken only after its size and modification time have stayed the same over one
full polling interval (a file still being written is never read). Refused files are
moved to a quarantine folder with a ``.reason.txt`` beside each; a file the catalogue
could not take for a reason of its own (busy, read-only, unreachable) stays where it is
and is tried again at the next poll. Whatever one file does, the watcher goes on with
the next: no file stops the lab's log. What has been handled
is remembered in a small state file in the watched folder, so a restarted watcher neither
re-reads old files nor misses new ones; the ingest log's content hashes make a repeated
ingest harmless anyway.
"""

from __future__ import annotations

import json
import logging
import os
import shutil
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from runlog.ingest import IngestResult
from runlog.redaction import ScrubbingFilter

__all__ = ["Watcher", "STATE_FILE"]

STATE_FILE = ".runlog-watch.json"


def _printable(text: str) -> str:
    """``text`` with control characters escaped: a file name or run key holding a newline
    or a terminal escape cannot forge or rewrite lines of the watch log."""
    return "".join(c if c.isprintable() or c == " " else repr(c)[1:-1] for c in text)


@dataclass
class Watcher:
    """Polls ``folder`` for ``*.parquet`` (shot or monitor) and ``*.csv`` (monitor) files and hands complete ones to ``ingest``.

    ``ingest`` takes a list of paths and returns one :class:`IngestResult` per path (in
    practice ``Catalogue.ingest``). ``after_ingest``, if given, is called after each look
    that ingested something new, with those results (in practice: judge drift and record
    alarms, :meth:`Catalogue.check_drift`).
    """

    folder: Path
    ingest: Callable[[list[Path]], list[IngestResult]]
    quarantine: Path | None = None
    after_ingest: Callable[[list[IngestResult]], object] | None = None
    after_poll: Callable[[], object] | None = None  # e.g. send the daily digest when due
    log: logging.Logger = field(default_factory=lambda: logging.getLogger("runlog.watch"))
    _seen: dict[str, tuple[int, int]] = field(default_factory=dict)  # name -> (size, mtime_ns) last poll
    _done: dict[str, tuple[int, int]] = field(default_factory=dict)  # name -> (size, mtime_ns) handled

    def __post_init__(self) -> None:
        self.folder = Path(self.folder)
        if not self.folder.is_dir():
            raise NotADirectoryError(f"{self.folder}: not a folder")
        self.quarantine = Path(self.quarantine) if self.quarantine else self.folder / "quarantine"
        if not any(isinstance(f, ScrubbingFilter) for f in self.log.filters):
            self.log.addFilter(ScrubbingFilter())  # an error may quote the catalogue's URL
        self._done = self._load_state()

    @property
    def state_path(self) -> Path:
        return self.folder / STATE_FILE

    def _load_state(self) -> dict[str, tuple[int, int]]:
        try:
            raw = json.loads(self.state_path.read_text(encoding="utf-8"))
            return {name: (int(v[0]), int(v[1])) for name, v in raw.get("done", {}).items()}
        except FileNotFoundError:
            return {}
        except (ValueError, KeyError, TypeError, IndexError):
            self.log.warning("state file %s unreadable; starting afresh (already ingested files stay so)", self.state_path)
            return {}

    def _save_state(self) -> None:
        temporary = self.state_path.with_suffix(".tmp")
        temporary.write_text(json.dumps({"done": self._done}, sort_keys=True), encoding="utf-8")
        os.replace(temporary, self.state_path)

    def poll(self) -> list[IngestResult]:
        """One look at the folder: ingest every file that has stopped changing."""
        current: dict[str, tuple[int, int]] = {}
        for path in sorted((*self.folder.glob("*.parquet"), *self.folder.glob("*.csv"))):
            try:
                stat = path.stat()
            except FileNotFoundError:  # deleted between listing and looking
                continue
            if path.is_file():
                current[path.name] = (stat.st_size, stat.st_mtime_ns)
        ready = [
            name
            for name, signature in current.items()
            if self._done.get(name) != signature and self._seen.get(name) == signature
        ]
        self._seen = current
        results: list[IngestResult] = []
        for name in ready:
            path = self.folder / name
            shown = _printable(name)
            try:
                result = self.ingest([path])[0]
            except Exception as error:  # noqa: BLE001 - one file never stops the watcher
                from runlog.store.failures import describe

                self.log.warning("could not ingest %s, will try again: %s", shown, describe(error, doing="ingesting it").message)
                continue
            try:
                signature_now = (path.stat().st_size, path.stat().st_mtime_ns)
            except FileNotFoundError:
                self.log.warning("%s disappeared while being read; it was %s", shown, result.status)
                continue
            if signature_now != current[name]:
                # Changed while we read it: whatever we concluded, look again later.
                self.log.info("%s changed while being read; will look again", shown)
                continue
            results.append(result)
            if result.status == "refused" and result.files_fault:
                try:
                    self._quarantine(path, result.reason or "refused")
                except OSError as error:
                    self.log.warning("refused %s but could not move it to %s: %s", shown, _printable(str(self.quarantine)), error)
                    self._done[name] = current[name]
                self.log.warning("refused %s: %s", shown, _printable(result.reason or "refused"))
            elif result.status == "refused":
                self.log.warning("could not ingest %s now, will try again: %s", shown, _printable(result.reason or ""))
            else:
                self._done[name] = current[name]
                self.log.info("%s %s: %s (%d shots)", result.status, shown, _printable(", ".join(result.runs)), result.shots)
        if ready:
            self._save_state()
        fresh = [r for r in results if r.status == "ingested"]
        if fresh and self.after_ingest is not None:
            self.after_ingest(fresh)
        if self.after_poll is not None:
            self.after_poll()
        return results

    def _quarantine(self, path: Path, reason: str) -> None:
        assert self.quarantine is not None
        self.quarantine.mkdir(parents=True, exist_ok=True)
        target = self.quarantine / path.name
        if target.exists():
            target = self.quarantine / f"{path.stem}.{time.strftime('%Y%m%dT%H%M%S')}{path.suffix}"
        shutil.move(str(path), target)
        target.with_name(target.name + ".reason.txt").write_text(reason + "\n", encoding="utf-8")

    def run(self, interval: float, *, stop_after: float | None = None) -> None:
        """Poll every ``interval`` seconds until interrupted (or ``stop_after`` seconds)."""
        started = time.monotonic()
        self.log.info("watching %s every %.1f s", self.folder, interval)
        while True:
            self.poll()
            if stop_after is not None and time.monotonic() - started >= stop_after:
                return
            time.sleep(interval)
