"""An older chitally next to the working tree's, for side-by-side benchmarks.

`export(rev)` writes the package as it was at git revision `rev` to a temporary
directory (kept between runs, so that its numba cache survives) and returns that
directory; a subprocess with it on PYTHONPATH imports the old `chitally`. `load(rev)`
imports it into this process under the name ``chitally_base``: its absolute references to
``chitally`` (some imports, the lazy attribute table of ``__init__``) are rewritten to that
name on export, so the old modules use each other, never the new ones.
"""

from __future__ import annotations

import importlib
import io
import re
import subprocess
import sys
import tarfile
import tempfile
from pathlib import Path
from types import ModuleType

# the last revision before blocked kernels, width tags and warm-up
DEFAULT_REV = "f8e54cf"

ROOT = Path(__file__).resolve().parent.parent


def _full(rev: str) -> str:
    return subprocess.run(["git", "rev-parse", rev], cwd=ROOT, check=True, capture_output=True,
                          text=True).stdout.strip()


def export(rev: str = DEFAULT_REV, name: str = "chitally") -> Path:
    """A directory holding package `name`: src/chitally at `rev`."""
    full = _full(rev)
    home = Path(tempfile.gettempdir()) / f"chitally-baseline-{full[:12]}-{name}-v2"
    if not (home / name / "__init__.py").exists():
        archive = subprocess.run(["git", "archive", full, "src/chitally"], cwd=ROOT, check=True,
                                 capture_output=True).stdout
        with tarfile.open(fileobj=io.BytesIO(archive)) as tar:
            for member in tar.getmembers():
                if not member.isfile():
                    continue
                rel = Path(member.name).relative_to("src/chitally")
                target = home / name / rel
                target.parent.mkdir(parents=True, exist_ok=True)
                data = tar.extractfile(member).read()
                if name != "chitally" and member.name.endswith(".py"):
                    data = _renamed(data, name)
                target.write_bytes(data)
    return home


def _renamed(source: bytes, name: str) -> bytes:
    """A module's source with its absolute references to the package (imports, and the
    lazy attribute table of __init__) turned to `name`, so that the old package never
    reaches the working tree's modules."""
    text = source.decode()
    text = re.sub(r"\bfrom chitally([. ])", rf"from {name}\1", text)
    text = re.sub(r"\bimport chitally\b", f"import {name}", text)
    text = re.sub(r"([\"'])chitally\.", rf"\g<1>{name}.", text)
    return text.encode()


def load(rev: str = DEFAULT_REV) -> ModuleType:
    """The package at `rev`, imported as ``chitally_base``."""
    home = export(rev, "chitally_base")
    if str(home) not in sys.path:
        sys.path.insert(0, str(home))
    return importlib.import_module("chitally_base")
