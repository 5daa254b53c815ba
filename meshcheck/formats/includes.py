"""Text sources made of several files (Nastran INCLUDE, Abaqus *INCLUDE).

:func:`load_text` reads a file as bytes with its encoding quirks removed
(byte-order mark, CR/CRLF line ends, tabs expanded to 8-column stops) and
splices included files in place of the statements that name them.  Included
paths are resolved relative to the including file, must stay inside the
folder tree of the main mesh file (unless allowed), may not form a cycle and
may be included only once.  :class:`Source` maps a byte position of the
merged text back to a file and line for messages.
"""
from __future__ import annotations

import bisect
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

from ..errors import MeshReadError
from .raw import clean_name

__all__ = ["Source", "load_text", "normalise_text", "MAX_INCLUDES"]

#: most include statements followed in one mesh (a guard, not a format limit)
MAX_INCLUDES = 1000
#: deepest nesting of includes
MAX_DEPTH = 32


@dataclass(frozen=True)
class Source:
    """Merged text of a main file and its includes.

    data : the text, normalised (LF line ends, no tabs, no BOM).
    segments : (offset in data, file, line number of that offset in the file), sorted.
    files : every file that contributed, main file first.
    """

    data: bytes
    segments: tuple[tuple[int, Path, int], ...]
    files: tuple[Path, ...]

    def where(self, pos: int) -> str:
        """``file:line`` of a byte position of the merged text."""
        offs = [s[0] for s in self.segments]
        k = max(bisect.bisect_right(offs, pos) - 1, 0)
        off, path, line = self.segments[k]
        line += self.data.count(b"\n", off, max(pos, off))
        return f"{clean_name(str(path), 300)}:{line}"


def normalise_text(raw: bytes, path: Path, expand_tabs: bool = True) -> bytes:
    """Strip a UTF-8 BOM, turn CRLF/CR into LF and expand tabs to 8-column stops."""
    if raw.startswith((b"\xff\xfe", b"\xfe\xff")):
        raise MeshReadError(f"{path}: the file is UTF-16 text; save it as plain ASCII or "
                            "UTF-8 text and read it again")
    if raw.startswith(b"\xef\xbb\xbf"):
        raw = raw[3:]
    if b"\r" in raw:
        raw = raw.replace(b"\r\n", b"\n").replace(b"\r", b"\n")
    if expand_tabs and b"\t" in raw:
        raw = b"\n".join(line.expandtabs(8) if b"\t" in line else line
                         for line in raw.split(b"\n"))
    return raw


def _inside(path: Path, root: Path) -> bool:
    try:
        path.relative_to(root)
        return True
    except ValueError:
        return False


def load_text(path: Path, find: Callable[[bytes], list[tuple[int, int, str, int]]],
              allow_outside: bool = False, expand_tabs: bool = True,
              what: str = "INCLUDE") -> Source:
    """Read ``path`` and splice in the files its include statements name.

    find(text) -> [(start, end, name, line)] byte span of each include
    statement (end just past its last line), the file name and the line number.
    """
    root = path.resolve().parent
    state = {"count": 0, "seen": set(), "files": []}

    def merge(p: Path, stack: tuple[Path, ...]):
        real = p.resolve()
        state["files"].append(p)
        text = normalise_text(p.read_bytes(), p, expand_tabs)
        found = find(text)
        if not found:
            return text, [(0, p, 1)]
        pieces, segs, off, prev, prev_line = [], [], 0, 0, 1
        for start, end, name, line in found:
            where = f"{p}:{line}"
            piece = text[prev:start]
            segs.append((off, p, prev_line))
            pieces.append(piece)
            off += len(piece)
            state["count"] += 1
            if state["count"] > MAX_INCLUDES or len(stack) >= MAX_DEPTH:
                raise MeshReadError(f"{where}: more than {MAX_INCLUDES} {what} statements or "
                                    f"nesting deeper than {MAX_DEPTH}; merge the files first")
            shown = clean_name(name)
            if not name or "\x00" in name:
                raise MeshReadError(f"{where}: {what} without a usable file name; "
                                    "give the file name in quotes")
            target = Path(name)
            target = target if target.is_absolute() else p.parent / target
            try:
                treal = target.resolve()
            except (OSError, RuntimeError):
                raise MeshReadError(f"{where}: {what} '{shown}' cannot be resolved; "
                                    "check the file name") from None
            if not allow_outside and not _inside(treal, root):
                raise MeshReadError(f"{where}: {what} '{shown}' points outside the mesh folder "
                                    f"{root}; copy the file into that folder or allow it "
                                    "explicitly (--allow-outside)")
            if treal in stack or treal == real:
                chain = " -> ".join(str(s.name) for s in (*stack, real, treal))
                raise MeshReadError(f"{where}: {what} '{shown}' includes itself ({chain}); "
                                    "remove the cycle")
            if treal in state["seen"]:
                raise MeshReadError(f"{where}: {what} '{shown}' is included a second time; "
                                    "include each file once")
            if not treal.is_file():
                raise MeshReadError(f"{where}: {what} '{shown}' not found (looked for "
                                    f"{target}); put the file next to the mesh or fix the name")
            state["seen"].add(treal)
            sub, subsegs = merge(target, (*stack, real))
            if sub and not sub.endswith(b"\n"):
                sub += b"\n"
            segs.extend((off + o, sp, sl) for o, sp, sl in subsegs)
            pieces.append(sub)
            off += len(sub)
            prev = end
            prev_line = line + text.count(b"\n", start, end)
        segs.append((off, p, prev_line))
        pieces.append(text[prev:])
        return b"".join(pieces), segs

    data, segs = merge(path, ())
    return Source(data, tuple(segs), tuple(state["files"]))
