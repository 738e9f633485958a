"""The README's library example runs as written, on the bundled demo."""

import os
import re
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_library_example_runs(tmp_path, capsys):
    text = (ROOT / "README.md").read_text()
    code = re.search(r"## Library\n\n```python\n(.*?)```", text, re.S).group(1)
    (tmp_path / "sample_images").symlink_to(ROOT / "sample_images")
    cwd = os.getcwd()
    os.chdir(tmp_path)
    try:
        namespace = {}
        exec(compile(code, "README.md", "exec"), namespace)
    finally:
        os.chdir(cwd)
    assert (tmp_path / "overlay.fits").stat().st_size > 0
    assert len(namespace["table"]) == 3 * len(namespace["knots"])
    assert "offset_arcsec" in capsys.readouterr().out
