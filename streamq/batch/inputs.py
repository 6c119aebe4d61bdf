"""Which files a batch runs over, and where each one's outputs go.

``--inputs`` takes a folder (every audio file below it, by extension), a
glob pattern (``**`` reaches into subfolders), a single audio file, or a
list file (a text file with one path per line, relative ones taken relative
to the list file's folder; lines starting with ``#`` are comments). The
option can be repeated; the files are taken in the order given, sorted inside
each folder or pattern, each file once.
"""

from __future__ import annotations

import glob
import hashlib
import os
import re
from pathlib import Path

from streamq.errors import StreamqError

#: File-name extensions taken as audio when a folder is scanned (formats libsndfile reads).
AUDIO_EXTENSIONS = frozenset({
    "wav", "wave", "bwf", "flac", "ogg", "oga", "opus", "aif", "aiff", "aifc", "au", "snd",
    "caf", "w64", "rf64", "mp3", "voc", "sd2", "paf", "svx", "nist", "sph", "ircam", "xi",
    "htk", "sds", "avr", "mat4", "mat5", "pvf", "wve", "mpc2k",
})

_MAGIC = re.compile(r"[*?\[]")
_UNSAFE = re.compile(r"[^A-Za-z0-9_.-]+")


def is_audio_name(path: Path) -> bool:
    return path.suffix.lower().lstrip(".") in AUDIO_EXTENSIONS


def _hidden(parts) -> bool:
    return any(p.startswith(".") and p not in (".", "..") for p in parts)


def _scan_folder(folder: Path) -> list[Path]:
    found = []
    for root, dirs, files in os.walk(folder):
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        for name in sorted(files):
            p = Path(root) / name
            if not name.startswith(".") and is_audio_name(p):
                found.append(p)
    return found


def _read_list(path: Path) -> list[Path]:
    try:
        text = path.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise StreamqError(f"--inputs {path}: neither an audio file name (by extension) nor a "
                           f"text list of files") from None
    except OSError as exc:
        raise StreamqError(f"--inputs {path}: cannot read the list ({exc.strerror or exc})") from None
    out = []
    for line in text.splitlines():
        entry = line.strip()
        if not entry or entry.startswith("#"):
            continue
        p = Path(entry).expanduser()
        out.append(p if p.is_absolute() else path.parent / p)
    return out


def expand_inputs(specs: list[str], exclude: Path | None = None) -> list[Path]:
    """Turn the ``--inputs`` values into a list of absolute file paths.

    Parameters
    ----------
    specs : folders, glob patterns, audio files or list files.
    exclude : a folder whose files are never inputs (the batch's output folder, so
        that a re-run over a folder holding it does not pick up decoded files).

    Raises
    ------
    StreamqError
        When a value names nothing, or matches no file.
    """
    ex = Path(exclude).resolve() if exclude is not None else None
    seen: set[Path] = set()
    files: list[Path] = []
    for spec in specs:
        p = Path(spec).expanduser()
        if p.is_dir():
            found = _scan_folder(p)
            what = "folder holds no audio files (by extension: .wav, .flac, ...)"
        elif p.is_file():
            found = [p] if is_audio_name(p) else _read_list(p)
            what = "list names no files"
        elif _MAGIC.search(spec):
            found = sorted(Path(m) for m in glob.glob(str(p), recursive=True))
            found = [m for m in found if m.is_file() and not _hidden(m.parts)]
            what = "pattern matched no files"
        else:
            raise StreamqError(f"--inputs {spec!r}: no such file or folder (give a folder, a glob "
                               f"pattern in quotes, an audio file or a list file)")
        kept = 0
        for f in found:
            a = f.resolve()
            if ex is not None and ex in a.parents:
                continue
            kept += 1
            if a not in seen:
                seen.add(a)
                files.append(a)
        if not kept:
            raise StreamqError(f"--inputs {spec!r}: {what}")
    if not files:
        raise StreamqError("no inputs matched")
    return files


def folder_name(path: Path) -> str:
    """Output folder name of one input: its name made safe, and a short hash of its
    absolute path, so equal names in different folders never share a folder and a
    re-run finds the same folder again."""
    stem = _UNSAFE.sub("-", Path(path).stem).strip("-.")[:48] or "input"
    digest = hashlib.sha1(str(path).encode("utf-8", "surrogateescape")).hexdigest()[:12]
    return f"{stem}-{digest}"
