"""Audio file helpers shared by file nodes: clear errors on open, and writers
that never leave half a file under the final name (:class:`SafeWriter` for
audio, :func:`replacing` for any other output file: CSV, JSON, HTML, PNG)."""

from __future__ import annotations

import contextlib
import os
import re
import shutil
import stat
from pathlib import Path
from typing import Callable

import numpy as np

_PCM_BITS = {"PCM_S8": 8, "PCM_U8": 8, "PCM_16": 16, "PCM_24": 24, "PCM_32": 32}


def subtype_bits(subtype: str) -> int | None:
    """Word length of an integer PCM subtype (None for float and compressed formats).

    FLAC stores integer PCM, so its PCM_16/PCM_24 subtypes count too.
    """
    return _PCM_BITS.get(subtype)


def open_for_reading(path: Path, fail: Callable[[str], Exception]):
    """Open an audio file with soundfile; errors become one-line messages."""
    import soundfile as sf
    path = Path(path)
    try:
        st = path.stat()
    except FileNotFoundError:
        raise fail(f"{path}: no such file") from None
    except OSError as exc:  # name too long, a loop of links, a file used as a folder...
        raise fail(f"{path}: cannot open ({exc.strerror or exc})") from None
    if stat.S_ISDIR(st.st_mode):
        raise fail(f"{path}: is a folder, not an audio file")
    try:
        f = sf.SoundFile(str(path))
    except (sf.LibsndfileError, RuntimeError, OSError) as exc:
        msg = str(exc).split("\n")[0]
        if path.stat().st_size == 0:
            msg = "the file is empty"
        raise fail(f"{path}: not a readable audio file ({msg})") from None
    info = _Info(f.samplerate, f.channels, f.frames, f.subtype, f.format)
    if info.frames <= 0:
        f.close()
        raise fail(f"{path}: the file holds no audio frames")
    cut = _truncated(f)
    if cut:
        f.close()
        raise fail(f"{path}: the file is truncated: its header declares {cut[0]} bytes of audio "
                   f"but only {cut[1]} are there (the audio ends at sample {info.frames})")
    return f, info


_CHUNK_SIZE_LOG = re.compile(r"^\s*(?:data|SSND)\s*:\s*(\d+)\s*\(should be (\d+)\)", re.M)


def _truncated(f) -> tuple[int, int] | None:
    """(declared, present) audio bytes when the header promises more than the file
    holds. libsndfile then quietly reads what is there, so say it instead. Sizes
    of 2 GiB and more are left alone: writers that do not know the length in
    advance put such values in the header."""
    try:
        log = f.extra_info
    except Exception:
        return None
    m = _CHUNK_SIZE_LOG.search(log or "")
    if m:
        declared, present = int(m.group(1)), int(m.group(2))
        if present < declared < 0x7FF00000:
            return declared, present
    return None


#: Float samples beyond this magnitude (+60 dB above full scale) are refused:
#: such files were written with integer-scaled floats (32767, 8388607, ...) or
#: hold garbage, and their squares overflow the meter and the design math.
FAR_BEYOND_FULL_SCALE = 1000.0


def far_beyond_full_scale(data: np.ndarray, start: int, path: Path) -> str | None:
    """A one-line message for the first finite sample beyond
    :data:`FAR_BEYOND_FULL_SCALE` in ``data`` (frames, channels), else None."""
    over = np.abs(data) > FAR_BEYOND_FULL_SCALE
    if not over.any():
        return None
    frame, ch = np.argwhere(over)[0]
    value = float(data[frame, ch])
    return (f"{path}: sample {start + int(frame)} is {value:.6g}, more "
            f"than 60 dB above full scale (1.0); streamq takes float audio with full scale "
            f"= 1 (was the file written with integer-scaled samples?)")


class _Info:
    __slots__ = ("samplerate", "channels", "frames", "subtype", "format")

    def __init__(self, samplerate, channels, frames, subtype, fmt):
        self.samplerate, self.channels, self.frames = samplerate, channels, frames
        self.subtype, self.format = subtype, fmt


def format_for(path: Path) -> str:
    """libsndfile major format from a file name's extension."""
    import soundfile as sf
    ext = path.suffix.lower().lstrip(".")
    fmts = {k.lower(): k for k in sf.available_formats()}
    alias = {"aif": "aiff", "oga": "ogg", "opus": "ogg"}
    ext = alias.get(ext, ext)
    if ext not in fmts:
        raise ValueError(f"unknown audio file extension '.{ext}' (known: "
                         f"{', '.join(sorted(fmts))})")
    return fmts[ext]


class SafeWriter:
    """Writes an audio file under a temporary name beside the target and renames
    it on close. On an interrupted run the file written so far is closed
    (header updated, so it stays valid) and renamed too; on a write error the
    temporary file is removed and nothing is left under the final name.
    """

    def __init__(self, path: Path, rate: int, channels: int, subtype: str | None,
                 fail: Callable[[str], Exception]):
        import soundfile as sf
        self.path = Path(path)
        self.fail = fail
        try:
            fmt = format_for(self.path)
        except ValueError as exc:
            raise fail(str(exc)) from None
        subtype = subtype or sf.default_subtype(fmt)
        if not sf.check_format(fmt, subtype):
            raise fail(f"{self.path}: subtype {subtype} is not available for {fmt} files "
                       f"(available: {', '.join(sf.available_subtypes(fmt))})")
        self.subtype = subtype
        self.bits = subtype_bits(subtype)
        self.tmp = self.path.with_name(f".{self.path.name}.part")
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self._f = sf.SoundFile(str(self.tmp), "w", samplerate=rate, channels=channels,
                                   subtype=subtype, format=fmt)
        except (sf.LibsndfileError, RuntimeError, OSError) as exc:
            raise fail(f"{self.path}: cannot create ({_short(exc)})") from None
        self.frames = 0
        self.clipped = 0
        if self.bits is not None or fmt in ("FLAC", "OGG", "MP3"):
            bits = self.bits or 16
            self._hi = 1.0 - 2.0 ** -(bits - 1)
        else:
            self._hi = None

    def write(self, data: np.ndarray) -> None:
        if self._hi is not None:
            over = (data > self._hi) | (data < -1.0)
            if over.any():
                self.clipped += int(over.sum())
                data = np.clip(data, -1.0, self._hi)
        try:
            self._f.write(data)
        except Exception as exc:
            why = _short(exc)
            if why.startswith("System error") and _disk_full(self.tmp.parent):
                why = "No space left on device"  # libsndfile does not say which error
            self.discard()
            raise self.fail(f"{self.path}: write failed after {self.frames} frames "
                            f"({why}); nothing was left under that name") from None
        self.frames += data.shape[0]

    #: formats libsndfile can reopen to continue writing (a checkpoint closes the file,
    #: so its header is whole, and reopens it to append)
    CONTINUABLE = ("WAV", "WAVEX", "AIFF", "AU", "CAF", "W64", "RF64")

    def checkpoint(self) -> dict:
        """Make the frames written so far durable; what :meth:`resume` needs."""
        import soundfile as sf
        fmt = self._f.format if self._f is not None else None
        if fmt not in self.CONTINUABLE:
            return {"frames": self.frames, "clipped": self.clipped, "continuable": False,
                    "format": fmt}
        f, self._f = self._f, None
        try:
            f.close()
            self._f = sf.SoundFile(str(self.tmp), "r+")
            self._f.seek(0, sf.SEEK_END)
        except Exception as exc:
            raise self.fail(f"{self.path}: could not make a checkpoint ({_short(exc)})") from None
        return {"frames": self.frames, "clipped": self.clipped, "continuable": True,
                "format": fmt}

    def resume(self, info: dict, earlier: Path) -> None:
        """Continue the file ``earlier`` (written by an interrupted run) from the
        checkpoint ``info``, in place of the empty file this writer opened."""
        import soundfile as sf
        if not info.get("continuable"):
            raise self.fail(f"{self.path}: a {info.get('format')} file cannot be continued; "
                            f"run again without --resume")
        self._f.close()
        try:
            os.replace(earlier, self.tmp)
            self._f = sf.SoundFile(str(self.tmp), "r+")
            if self._f.frames < info["frames"]:
                raise ValueError(f"it holds {self._f.frames} frames, the checkpoint "
                                 f"{info['frames']}")
            self._f.truncate(info["frames"])
            self._f.seek(0, sf.SEEK_END)
        except Exception as exc:
            self.discard()
            raise self.fail(f"{self.path}: cannot continue the earlier file ({_short(exc)})") \
                from None
        self.frames, self.clipped = int(info["frames"]), int(info["clipped"])

    def close(self) -> None:
        """Close and move into place (also used after an interruption)."""
        if self._f is None:
            return
        f, self._f = self._f, None
        try:
            f.close()
            os.replace(self.tmp, self.path)
        except Exception as exc:
            try:
                self.tmp.unlink()
            except OSError:
                pass
            raise self.fail(f"{self.path}: could not finish the file ({_short(exc)})") from None

    def discard(self) -> None:
        if self._f is not None:
            try:
                self._f.close()
            except Exception:
                pass
            self._f = None
        try:
            self.tmp.unlink()
        except OSError:
            pass


@contextlib.contextmanager
def replacing(path: Path, mode: str = "w", **open_kw):
    """Open ``path`` for writing as a temporary file beside it (``.NAME.part``)
    that takes the final name only once it is whole.

    Parameters
    ----------
    path : the file to write; an older file under that name is kept until the
        new one replaces it.
    mode : ``"w"`` (text, UTF-8 unless ``encoding`` is given) or ``"wb"``.
    **open_kw : passed to :func:`open` (e.g. ``newline=""`` for csv).

    Yields
    ------
    file
        The open temporary file, streamed into (nothing is held in memory).

    Raises
    ------
    OSError
        Or whatever the body raises; the temporary file is removed first, so
        nothing partial is left behind. Callers turn it into a one-line
        StreamqError naming the file.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.part")
    if "b" not in mode:
        open_kw.setdefault("encoding", "utf-8")
    try:
        with open(tmp, mode, **open_kw) as f:
            yield f
        os.replace(tmp, path)
    except BaseException:
        try:
            tmp.unlink()
        except OSError:
            pass
        raise


def unwritable(path: Path, exc: OSError) -> str:
    """The one-line reason a file written through :func:`replacing` failed
    (for :meth:`Node.fail` or a StreamqError)."""
    return f"{path}: cannot write ({exc.strerror or exc}); nothing was left under that name"


def _disk_full(folder: Path) -> bool:
    try:
        return shutil.disk_usage(folder).free < (1 << 20)
    except OSError:
        return False


def _short(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__
