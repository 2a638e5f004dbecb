"""The files that ship with the package for setting a job up: the config template (configs/) and
the scheduler kit (jobs/), and `bigsmooth init DIR`, which copies them out.

In a repository clone (or an editable install) they are the top-level configs/ and jobs/ folders;
an installed wheel carries the same files as bigsmooth/configs/ and bigsmooth/jobs/ (pyproject.toml
maps them in), so an operator who only ran `pip install bigsmooth` has them too.
"""

import os
import shutil
from pathlib import Path

from . import atomic
from .errors import InputMissingError, OutputError

HERE = Path(__file__).resolve().parent


def kit_dir(name):
    """The folder ``name`` ("configs" or "jobs"): inside the installed package, else the clone's."""
    for base in (HERE, HERE.parent):
        if (base / name).is_dir():
            return base / name
    raise InputMissingError(f"the {name}/ files of bigsmooth are missing from {HERE} and {HERE.parent}")


def kit_files():
    """{relative path in the target folder: source path} of everything `init` writes."""
    files = {"bigsmooth.toml": kit_dir("configs") / "template.toml"}
    for p in sorted(kit_dir("jobs").iterdir()):
        if p.is_file() and not p.name.startswith((".", "__")):
            files[f"jobs/{p.name}"] = p
    return files


def init(target, force=False):
    """Write a starter config and the scheduler kit into ``target``; refuses to overwrite any file
    unless ``force``. Returns the paths written."""
    target = Path(target)
    files = kit_files()
    existing = [str(target / rel) for rel in files if (target / rel).exists()]
    if existing and not force:
        raise OutputError(
            f"{len(existing)} of the files bigsmooth init writes exist already (e.g. {existing[0]}); "
            "nothing was written. Use --force to overwrite them, or another folder"
        )
    written = []
    try:
        for rel, src in files.items():
            dst = target / rel
            with atomic.atomic_path(dst) as tmp:
                shutil.copyfile(src, tmp)
                os.chmod(tmp, 0o755 if os.access(src, os.X_OK) else 0o644)
            written.append(str(dst))
    except OSError as exc:
        raise OutputError(f"cannot write into {target}: {exc}") from None
    return written
