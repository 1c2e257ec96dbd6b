"""The README's examples are files under docs/examples/, and these run them.

Each code block of the README that starts with ``# docs/examples/<file>`` must be that
file, character for character, so the README cannot drift from code that works.
"""

from __future__ import annotations

import os
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[1]
EXAMPLES = REPO / "docs" / "examples"
BLOCK = re.compile(r"```(?:python|bash)\n(# docs/examples/(\S+?):.*?)\n```", re.S)


def readme_blocks() -> dict[str, str]:
    return {m.group(2): m.group(1) for m in BLOCK.finditer((REPO / "README.md").read_text())}


def test_every_example_file_is_in_the_readme_verbatim():
    blocks = readme_blocks()
    files = sorted(p.name for p in EXAMPLES.iterdir() if p.suffix in (".py", ".sh"))
    assert sorted(blocks) == files
    for name, text in blocks.items():
        assert text == (EXAMPLES / name).read_text().rstrip("\n"), name


def _env() -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(REPO / "src"), env.get("PYTHONPATH", "")])
    return env


@pytest.mark.parametrize("name", ["single_cloud.py", "feature_matrix.py", "classifier.py", "compare_catalogues.py",
                                  "graphs_and_fields.py", "image_features.py",
                                  "distributed_run.py"])
def test_python_examples_run_as_scripts(name, tmp_path):
    res = subprocess.run([sys.executable, str(EXAMPLES / name)], cwd=tmp_path, env=_env(),
                         capture_output=True, text=True, timeout=600)
    assert res.returncode == 0, res.stderr[-3000:]
    assert "Traceback" not in res.stderr


def test_cli_example_runs(tmp_path):
    rng = np.random.default_rng(0)
    np.save(tmp_path / "cloud.npy", rng.random((3000, 3)))
    (tmp_path / "clouds").mkdir()
    for i in range(40):
        np.save(tmp_path / "clouds" / f"c{i}.npy", rng.random((60, 3)))
    (tmp_path / "edges.csv").write_text("u,v\n0,1\n1,2\n2,0\n2,3\n")
    np.save(tmp_path / "image.npy", rng.normal(size=(64, 64)))
    from PIL import Image

    for label in ("plain", "speckled"):  # a folder of images, one subfolder per class
        (tmp_path / "textures" / label).mkdir(parents=True)
        for i in range(4):
            Image.fromarray(rng.integers(0, 256, (24, 24), dtype=np.uint8)).save(
                tmp_path / "textures" / label / f"{i}.png")
    bindir = Path(sys.executable).parent
    env = _env()
    env["PATH"] = os.pathsep.join([str(bindir), env.get("PATH", "")])
    res = subprocess.run(["bash", "-e", str(EXAMPLES / "cli.sh")], cwd=tmp_path, env=env,
                         capture_output=True, text=True, timeout=900)
    assert res.returncode == 0, res.stderr[-3000:]
    for name in ("curve.json", "features.csv", "graph-curve.csv", "field-curve.csv", "texture-features.csv"):
        assert (tmp_path / name).exists(), name
