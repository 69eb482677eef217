"""Atomic output files.  Every file Crosswind writes (checkpoints, datasets, summaries, figures,
sensitivity tables, fit outputs) goes through :func:`atomic_write`: the content is written to a
temporary file in the target folder, flushed to disk (``fsync``), renamed over the target
(``os.replace``, atomic on POSIX) and the folder entry is flushed too.  A failure — a full disk, a
lost permission, Ctrl-C — leaves the previous file or none, never a truncated one, and an
``OSError`` becomes an :class:`OutputError` naming the file and the fix.

:func:`check_free_space` refuses to start a large write (the dataset) when the disk clearly cannot
hold it: HDF5 writers may crash outright on a full disk instead of raising.
"""
from __future__ import annotations

import json
import math
import os
import shutil
import tempfile
from collections.abc import Callable
from pathlib import Path


class OutputError(RuntimeError):
    """An output file could not be written; the message names the file and the fix."""


def _fsync_path(path: str | Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def make_folder(folder: Path | str) -> Path:
    """Create ``folder`` with its parents; an ``OSError`` becomes an :class:`OutputError`."""
    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise OutputError(f"cannot create the output folder {folder} ({exc.strerror or exc}); choose another "
                          "output folder") from exc
    return folder


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


#: mode of every written file: what open() would give a new file (0666 less the process umask)
_SHARED_MODE = 0o666 & ~_umask()


def atomic_write(path: Path | str, writer: Callable[[str], None]) -> None:
    """Write ``path`` atomically: ``writer(tmp)`` fills a temporary file in the same folder, which
    is flushed to disk and renamed over ``path``; the folder is then flushed as well."""
    path = Path(path)
    tmp = None
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent)
        os.close(fd)
        writer(tmp)
        os.chmod(tmp, _SHARED_MODE)      # mkstemp makes 0600; results are for colleagues too (umask applies)
        _fsync_path(tmp)
        os.replace(tmp, path)
        tmp = None
        _fsync_path(path.parent)
    except OSError as exc:
        raise OutputError(f"cannot write {path} ({exc.strerror or exc}); free disk space or choose another "
                          "output folder, then rerun the same command (finished checkpoints are kept)") from exc
    finally:
        if tmp is not None and os.path.exists(tmp):
            os.unlink(tmp)


def atomic_text(path: Path | str, text: str) -> None:
    """``path`` ← ``text`` (UTF-8), atomically."""
    def write(tmp):
        with open(tmp, "w", encoding="utf-8") as f:
            f.write(text)
    atomic_write(path, write)


def atomic_figure(fig, path: Path | str, **savefig_kw) -> None:
    """Save a matplotlib figure atomically (format from the target's suffix)."""
    fmt = Path(path).suffix.lstrip(".") or "png"
    atomic_write(path, lambda tmp: fig.savefig(tmp, format=fmt, **savefig_kw))


def check_free_space(folder: Path | str, needed: int, what: str) -> None:
    """Refuse to write ``what`` (about ``needed`` bytes) into ``folder`` when the disk has less
    free space than that plus a 16 MiB margin."""
    free = shutil.disk_usage(folder).free
    if free < needed + 16 * 2 ** 20:
        raise OutputError(f"not enough free space in {folder} for {what} (about {needed / 2 ** 20:.0f} MiB needed, "
                          f"{free / 2 ** 20:.0f} MiB free); free disk space or choose another output folder, then "
                          "rerun the same command (finished checkpoints are kept)")


# ----------------------------------------------------------------------------- scenario TOML ---
#: tables whose sub-tables are written inline (``name = {…}``): fit parameters, sensitivity steps
#: and design knobs read best one per line
INLINE_ROOTS = ("fit", "sensitivities", "design.knobs")


def toml_value(v) -> str:
    """One TOML value: booleans, integers, floats (inf/nan as TOML writes them), strings, lists,
    inline tables."""
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)                                   # 'nan' is valid TOML
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, list):
        return "[" + ", ".join(toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{k} = {toml_value(x)}" for k, x in v.items()) + "}"
    raise TypeError(f"cannot write {v!r} to TOML")


def scenario_toml(data: dict, prefix: str = "") -> str:
    """A scenario as TOML text (what ``tomllib.loads`` reads back): nested tables as ``[sections]``;
    sweeps ``{start, stop, …}`` and the sub-tables of :data:`INLINE_ROOTS` inline."""
    lines, subs = [], []
    inline_here = any(prefix == r or prefix.startswith(r + ".") for r in INLINE_ROOTS)
    for k, v in data.items():
        if isinstance(v, dict) and not (inline_here or ("start" in v and "stop" in v)):
            subs.append((k, v))
        else:
            lines.append(f"{k} = {toml_value(v)}")
    out = f"[{prefix}]\n" if prefix and (lines or not subs) else ""
    if lines:
        out += "\n".join(lines) + "\n\n"
    for k, v in subs:
        out += scenario_toml(v, f"{prefix}.{k}" if prefix else k)
    return out

