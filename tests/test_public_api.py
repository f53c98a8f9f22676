"""The public face of ``import pairvel``: documented names, a light import, the README's example."""

import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

import pairvel

README = Path(__file__).resolve().parents[1] / "README.md"


@pytest.mark.parametrize("name", [n for n in pairvel.__all__ if n != "__version__"])
def test_public_name_resolves_and_is_documented(name):
    obj = getattr(pairvel, name)
    assert (obj.__doc__ or "").strip(), f"pairvel.{name} has no docstring"
    assert name in pairvel.__doc__, f"pairvel.{name} is not described in the package docstring"


def test_unknown_name_is_an_attribute_error():
    with pytest.raises(AttributeError, match="no attribute 'no_such_thing'"):
        pairvel.no_such_thing  # noqa: B018


def test_import_does_not_load_the_compiled_engine():
    """The CLI imports the package first: the public names must not pull in numba or the stages."""
    code = "import sys, pairvel; print(sorted(m for m in ('numba', 'pairvel.pipeline', 'healpy') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"


def readme_example() -> str:
    text = README.read_text()
    section = text.split("## Using pairvel from Python", 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```python\n(.*?)```", section, flags=re.S)
    assert len(blocks) == 1
    return blocks[0]


def test_readme_example_runs_on_the_tiny_survey(tiny_survey, monkeypatch):
    """The README's notebook example, pointed at the tiny survey instead of the demo."""
    code = readme_example()
    for old, new in (('"configs/demo.toml"', repr(str(tiny_survey / "run.toml"))),
                     ('"demo-from-python"', repr(str(tiny_survey / "from-python"))),
                     ("cat.dec, 2.1)", "cat.dec, 12.0)")):
        assert old in code
        code = code.replace(old, new)
    monkeypatch.chdir(tiny_survey)
    scope = {}
    exec(compile(code, "README example", "exec"), scope)  # noqa: S102 - the project's own README text
    direct = pairvel.run_pipeline(pairvel.load_config(tiny_survey / "run.toml"))
    assert scope["result"].fit.amplitude == pytest.approx(direct.fit.amplitude, rel=1e-12)  # internal regression
    assert scope["again"].fit.amplitude == pytest.approx(direct.fit.amplitude, rel=1e-12)
    assert (tiny_survey / "from-python" / "summary.json").is_file()
    assert scope["curve"].p.shape == (scope["edges"].size - 1,) and np.isfinite(scope["v12"]).all()
