"""The JSON-lines events file of ``replay`` and of the daemon, and the rules for opening it.

No command writes over one of its inputs, and an existing file is replaced only when the user
says so (DESIGN.md "Command line"): :func:`check_output` refuses an output path that resolves to
an input (recording, config, golden), a directory that does not exist (nothing is created
behind the user's back) and an existing file unless the mode allows it — all before any work
starts, because :class:`EventLog` opens its file when it is made.

Rotation (``[output.rotate]``, for a daemon writing to an SD card for months): when the file
reaches ``max_bytes``, or has been open for ``max_age_s`` of host time, it is renamed
``NAME.1`` (``NAME.1`` → ``NAME.2`` …, the oldest beyond ``keep`` is deleted) and a new file is
started. A record is never split across two files.
"""

from __future__ import annotations

import os
import sys
import time
from pathlib import Path
from typing import Any, Callable, Iterable, Literal, TextIO

from .. import records
from ..errors import InputError

#: "new": the file must not exist; "replace": an existing file is overwritten (``--force``);
#: "append": records are added to an existing file (the daemon across restarts, ``--append``).
Mode = Literal["new", "replace", "append"]


def _same(a: Path, b: Path) -> bool:
    try:
        if a.resolve() == b.resolve():
            return True
        return a.exists() and b.exists() and os.path.samefile(a, b)
    except OSError:
        return False


def check_output(
    target: str,
    *,
    mode: Mode = "new",
    inputs: Iterable[tuple[str, str | Path | None]] = (),
    what: str = "events file",
    force_hint: str = "--force to replace it or --append to add to it",
) -> Path:
    """The path to write ``target`` to, or an :class:`InputError` saying why not.

    ``inputs`` are ``(label, path)`` pairs of the command's inputs; an output that is one of them
    (by resolved path, or the same file under another name) is refused whatever the mode.
    """
    p = Path(target)
    _refuse_inputs(p, target, what, inputs)
    parent = p.parent if str(p.parent) else Path(".")
    if not parent.is_dir():
        raise InputError(
            f"The directory {str(parent)!r} of the {what} {target!r} does not exist; create it "
            f"first (nothing is created for you)"
        )
    if p.is_dir():
        raise InputError(f"The {what} {target!r} is a directory")
    if p.exists() and not p.is_file():
        return p  # /dev/null, a FIFO, a terminal: nothing there to lose
    if p.exists() and mode == "new":
        raise InputError(f"The {what} {target!r} already exists; use {force_hint}")
    if p.exists() and not os.access(p, os.W_OK):
        raise InputError(f"The {what} {target!r} cannot be written: permission denied")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InputError(
            f"The {what} {target!r} cannot be written: the directory {str(parent)!r} is not writable"
        )
    return p


def _refuse_inputs(p: Path, target: str, what: str,
                   inputs: Iterable[tuple[str, str | Path | None]]) -> None:
    for label, inp in inputs:
        if inp is not None and _same(p, Path(inp)):
            raise InputError(
                f"The {what} {target!r} is the {label}; refusing to write over an input "
                f"(choose another path)"
            )


def check_inputs(output: Any, inputs: Iterable[tuple[str, str | Path | None]]) -> None:
    """``[output]``'s events path, and with rotation every rotated name, against the files it
    must never write over — without opening anything (``check``: the daemon refuses the same
    at start, and its directory may only exist on the station)."""
    if not output.events or output.events == "-":
        return
    inputs = list(inputs)
    _refuse_inputs(Path(output.events), output.events, "events file", inputs)
    rot = getattr(output, "rotate", None)
    if rot is not None:
        _check_rotated_names(Path(output.events), max(int(rot.keep), 1), inputs)


def _check_rotated_names(p: Path, keep: int, inputs: list[tuple[str, str | Path | None]]) -> None:
    """Rotation renames the file NAME.1 … NAME.keep and deletes the oldest: none of those names
    may be one of the inputs (a config or a spool called ``events.jsonl.2`` would be lost at the
    second rotation)."""
    for k in range(1, keep + 1):
        rotated = Path(f"{p}.{k}")
        for label, inp in inputs:
            if inp is not None and _same(rotated, Path(inp)):
                raise InputError(
                    f"The events file {str(p)!r} rotates into {str(rotated)!r}, which is the "
                    f"{label}; rotation would write over it (choose another events path)"
                )


class EventLog:
    """Writes records as JSON lines to a file or stdout (``-``), with optional rotation.

    ``target`` None or "" writes nothing. The file is opened (and so checked) at construction.
    """

    def __init__(
        self,
        target: str | None,
        *,
        flush_each: bool = False,
        mode: Mode = "new",
        inputs: Iterable[tuple[str, str | Path | None]] = (),
        max_bytes: int | None = None,
        max_age_s: float | None = None,
        keep: int = 5,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        self.flush_each = flush_each
        self.max_bytes = max_bytes
        self.max_age_s = max_age_s
        self.keep = max(int(keep), 1)
        self.clock = clock
        self.path: Path | None = None
        self.how = ""
        self.size = 0
        self.fh: TextIO | None = None
        self._created = False
        self.written = 0  # records written through this writer
        self.rotations = 0
        if not target:
            return
        if target == "-":
            self.fh = sys.stdout
            return
        inputs = list(inputs)
        p = check_output(target, mode=mode, inputs=inputs)
        if self.max_bytes is not None or self.max_age_s is not None:
            _check_rotated_names(p, self.keep, inputs)
        self._created = not p.exists()
        self.path = p
        #: what happened to the path, for the user: a new file, replaced, appended, a device
        self.how = "a new file" if self._created else {"replace": "replaced", "append": "appended"}.get(mode, "")
        if p.exists() and not p.is_file():
            mode = "append"  # a device or a pipe: written as it is, never rotated
            self.max_bytes = self.max_age_s = None
            self.how = "not a regular file"
        self._open("a" if mode == "append" else ("x" if mode == "new" else "w"))

    def _open(self, how: str) -> None:
        assert self.path is not None
        try:
            self.fh = open(self.path, how, encoding="utf-8")
        except FileExistsError:
            raise InputError(f"The events file {str(self.path)!r} already exists") from None
        except OSError as e:
            raise InputError(
                f"The events file {str(self.path)!r} cannot be written: {e.strerror}"
            ) from None
        try:
            self.size = self.fh.seek(0, os.SEEK_END)
        except (OSError, ValueError):  # a pipe or a terminal has no size
            self.size = 0
        self.opened = self.clock()

    @property
    def rotating(self) -> bool:
        return self.path is not None and (self.max_bytes is not None or self.max_age_s is not None)

    def __call__(self, rec: dict[str, Any]) -> None:
        if self.fh is None:
            return
        line = records.to_json(rec) + "\n"
        n = len(line)  # the JSON text is ASCII (escaped), so characters are bytes
        if self.rotating and self._due(n):
            self.rotate()
        self.fh.write(line)
        self.written += 1
        self.size += n
        if self.flush_each:
            self.fh.flush()

    def _due(self, nbytes: int) -> bool:
        if self.size == 0:
            return False  # a record larger than max_bytes still goes somewhere
        if self.max_bytes is not None and self.size + nbytes > self.max_bytes:
            return True
        return self.max_age_s is not None and self.clock() - self.opened >= self.max_age_s

    def rotate(self) -> None:
        """Close the current file, shift NAME.1 … NAME.keep up by one (dropping the oldest),
        rename the current file NAME.1 and start a new one."""
        assert self.path is not None and self.fh is not None
        self.fh.close()
        base = str(self.path)
        oldest = Path(f"{base}.{self.keep}")
        if oldest.exists():
            oldest.unlink()
        for k in range(self.keep - 1, 0, -1):
            src = Path(f"{base}.{k}")
            if src.exists():
                os.replace(src, f"{base}.{k + 1}")
        os.replace(self.path, f"{base}.1")
        self.rotations += 1
        self._open("w")

    def close(self) -> None:
        if self.fh is None:
            return
        if self.path is not None:
            self.fh.close()
        else:
            self.fh.flush()
        self.fh = None

    def abort(self) -> None:
        """The run failed before producing anything: close, and remove a file this writer
        created and wrote nothing into (so a corrected re-run is not refused)."""
        path, created, empty = self.path, self._created, self.written == 0
        self.close()
        if path is not None and created and empty:
            try:
                path.unlink()
            except OSError:
                pass


def from_config(
    output: Any,
    *,
    flush_each: bool = True,
    mode: Mode = "append",
    inputs: Iterable[tuple[str, str | Path | None]] = (),
) -> EventLog | None:
    """The daemon's events writer for ``[output]`` (``events``, ``rotate``); None without one.
    The daemon appends: a restart must not lose the records of the run before. ``inputs`` are
    the files it must never write over (the config, the spool): the events path and, with
    rotation, every rotated name are checked against them."""
    if not output.events:
        return None
    rot = getattr(output, "rotate", None)
    return EventLog(
        output.events,
        flush_each=flush_each,
        mode=mode,
        max_bytes=rot.max_bytes if rot is not None else None,
        max_age_s=rot.max_age_s if rot is not None else None,
        keep=rot.keep if rot is not None else 5,
        inputs=inputs,
    )
