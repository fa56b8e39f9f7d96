"""Output folders: the one guard, the one atomic writer, and the fit-folder schema.

Every folder cladewise creates carries a marker file, :data:`MARKER`
(``.cladewise-output``, JSON: what wrote it, the cladewise version, the time).
:func:`check_output_folder` is the only gate to an output folder and runs before any
work: it refuses the current folder, a folder above it, a folder holding the input
files, an existing file, a place that cannot be written, and any non-empty folder
without the marker (``overwrite`` replaces only folders cladewise wrote).
:func:`atomic_write` is the only writer: a folder is filled beside its final place
and swapped in, a file is written beside and renamed, so a failure or Ctrl-C leaves
either the old content or the new, never neither. New folders and files get the
user's usual permissions (the umask decides).

A fit folder holds ``posterior.nc`` (ArviZ InferenceData), ``summary.csv`` and
``summary.json`` (:func:`load_fit` reads it back). Everything later steps need is
inside: observed values and missing-cell mask (``observed_data``,
``constant_data``), standard errors, specimen counts, the regression design, the
tree(s) as arrays and as Newick, the spec text and the model description.
"""

from __future__ import annotations

import datetime as _dt
import json
import os
import shutil
import uuid
from pathlib import Path
from typing import Any, Callable, Iterable

from cladewise.errors import InputError

__all__ = [
    "MARKER",
    "atomic_write",
    "check_output_folder",
    "is_cladewise_output",
    "write_marker",
    "load_fit",
    "FIT_FILES",
]

MARKER = ".cladewise-output"
FIT_FILES = ("posterior.nc", "summary.csv", "summary.json")
_PARTIAL = ".partial-"  # hidden siblings being written (a grid run removes leftovers)


# --------------------------------------------------------------------------- marker
def write_marker(folder: str | Path, what: str) -> Path:
    """Write the marker file that lets cladewise recognise (and replace) its own folder."""
    from cladewise import __version__

    path = Path(folder) / MARKER
    doc = {"written_by": f"cladewise {what}", "cladewise_version": __version__,
           "time": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")}
    path.write_text(json.dumps(doc, indent=2) + "\n", encoding="utf-8")
    return path


def is_cladewise_output(folder: str | Path) -> bool:
    """True when ``folder`` carries a readable cladewise marker."""
    try:
        doc = json.loads((Path(folder) / MARKER).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return False
    return isinstance(doc, dict) and str(doc.get("written_by", "")).startswith("cladewise")


# --------------------------------------------------------------------------- guard
def _few(names: list[str], k: int = 5) -> str:
    shown = ", ".join(names[:k])
    return shown + (f" and {len(names) - k} more" if len(names) > k else "")


def _probe_writable(folder: Path, shown: str) -> None:
    """Create and remove a hidden folder: the only sure test (permissions, read-only mounts)."""
    probe = folder / f".cladewise-probe-{uuid.uuid4().hex[:10]}"
    try:
        os.mkdir(probe)
        os.rmdir(probe)
    except OSError as exc:
        reason = exc.strerror or type(exc).__name__
        raise InputError(
            f"--out {shown}: cannot write in {folder} ({reason}); choose a folder you can write to"
        ) from None


def check_output_folder(
    out: str | Path,
    *,
    overwrite: bool = False,
    inputs: Iterable[str | Path] = (),
    what: str = "output",
    add_to: bool = False,
) -> Path:
    """Refuse an output folder that cladewise must not or cannot write; call before any work.

    Parameters
    ----------
    out : path
        The folder to create (or to replace as a whole).
    overwrite : bool
        Replace an existing folder, which must carry the cladewise marker.
    inputs : paths
        Input files of the run; a folder holding any of them is refused.
    what : str
        What will be written (for messages), e.g. ``"fit"``.
    add_to : bool
        The folder is added to rather than replaced (a grid's folder of fits): an
        existing folder is fine when empty or carrying the marker.

    Returns
    -------
    Path
        ``out`` as an absolute path.

    Raises
    ------
    InputError
        With what is wrong and what to do instead.
    """
    shown = str(out)
    target = Path(out).expanduser().resolve()
    cwd = Path.cwd().resolve()
    if target == cwd or target in cwd.parents:
        raise InputError(
            f"--out {shown} is the current folder or a folder above it; cladewise writes its {what} "
            "into a folder of its own: give a new folder name, e.g. --out results/run1"
        )
    for p in inputs:
        if p is None:
            continue
        rp = Path(p).expanduser().resolve()
        if target == rp or target in rp.parents:
            raise InputError(
                f"--out {shown} holds the input file {p}; cladewise never writes over its inputs: "
                "give a new folder for the results"
            )
    if target.exists() or target.is_symlink():
        if not target.is_dir():
            raise InputError(f"--out {shown} is an existing file, not a folder; give a folder name "
                             f"(e.g. {shown}_{what})")
        try:
            # hidden half-written siblings of an interrupted run are cladewise's own
            entries = sorted(e for e in os.listdir(target) if not (e.startswith(".") and _PARTIAL in e))
        except OSError as exc:
            raise InputError(f"--out {shown}: cannot read that folder ({exc.strerror}); choose another") from None
        if entries:
            if not is_cladewise_output(target):
                raise InputError(
                    f"--out {shown} is not empty: it holds files that cladewise did not write "
                    f"({_few(entries)}); cladewise replaces only folders it wrote itself, so --overwrite "
                    "cannot be used here either: give a new folder name"
                )
            if not overwrite and not add_to:
                raise InputError(
                    f"--out {shown} is not empty: it holds an earlier cladewise {what} ({_few(entries)}); "
                    "pass --overwrite to replace it, or give a new folder name"
                )
        _probe_writable(target if add_to else target.parent, shown)
    else:
        anc = target.parent
        while not anc.exists():
            anc = anc.parent
        if not anc.is_dir():
            raise InputError(f"--out {shown}: {anc} is a file, so no folder can be made inside it; "
                             "give another folder name")
        _probe_writable(anc, shown)
    return target


# --------------------------------------------------------------------------- writer
def atomic_write(target: str | Path, content: str | bytes | Callable[[Path], Any], *, what: str = "output") -> Path:
    """Write a file or a whole folder so that it appears complete or not at all.

    Parameters
    ----------
    target : path
        The file or folder to (re)place. Parent folders are created as needed.
    content : str, bytes or callable
        Text or bytes: the file's content. A callable: a folder is made and
        ``content(folder)`` fills it; the marker is added and the folder is swapped
        into place (the old one, if any, is removed only after the swap).
    what : str
        For a folder, what wrote it (recorded in the marker), e.g. ``"fit"``.

    Returns
    -------
    Path
        ``target``.
    """
    target = Path(target)
    target.parent.mkdir(parents=True, exist_ok=True)
    token = uuid.uuid4().hex[:10]
    tmp = target.parent / f".{target.name}{_PARTIAL}{token}"
    if callable(content):
        os.mkdir(tmp)  # mode 0o777 minus the umask: the user's usual permissions
        try:
            content(tmp)
            write_marker(tmp, what)
            if target.exists() or target.is_symlink():
                old = target.parent / f".{target.name}{_PARTIAL}old-{token}"
                os.replace(target, old)
                try:
                    os.replace(tmp, target)
                except BaseException:
                    os.replace(old, target)
                    raise
                shutil.rmtree(old, ignore_errors=True)
            else:
                os.replace(tmp, target)
        except BaseException:
            shutil.rmtree(tmp, ignore_errors=True)
            raise
        return target
    data = content.encode("utf-8") if isinstance(content, str) else bytes(content)
    try:
        with open(tmp, "xb") as fh:  # mode 0o666 minus the umask
            fh.write(data)
        os.replace(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return target


# --------------------------------------------------------------------------- fit folder
def load_fit(out_dir: str | Path) -> tuple[Any, dict[str, Any]]:
    """Read a saved fit folder: (InferenceData, summary.json contents).

    Raises
    ------
    InputError
        Not a fit folder, unreadable JSON or netCDF, or no posterior group.
    """
    import arviz as az

    out = Path(out_dir)
    nc, js = out / "posterior.nc", out / "summary.json"
    if not out.is_dir() or not nc.is_file() or not js.is_file():
        raise InputError(
            f"{str(out)!r} is not a cladewise fit folder (expected posterior.nc and summary.json "
            "inside); run 'cladewise fit SPEC --out DIR' first and pass that DIR"
        )
    try:
        info = json.loads(js.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(f"{str(js)!r} could not be read as JSON ({exc}); refit to recreate it") from None
    if not isinstance(info, dict):
        raise InputError(f"{str(js)!r} does not hold a JSON object; refit to recreate it")
    try:
        idata = az.from_netcdf(nc)
    except Exception as exc:  # netCDF errors come in many types
        raise InputError(f"{str(nc)!r} could not be read ({exc}); refit to recreate it") from None
    if "posterior" not in idata.groups():
        raise InputError(f"{str(nc)!r} has no posterior group; refit to recreate it")
    return idata, info
