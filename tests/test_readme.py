"""The README's Python example runs and prints what the README says it prints."""

from __future__ import annotations

import contextlib
import io
import pathlib
import re

README = pathlib.Path(__file__).resolve().parents[1] / "README.md"


def test_readme_core_example_output():
    text = README.read_text()
    code = re.search(r"```python\n(.*?)```", text, re.S).group(1)
    expected = []
    for line in code.splitlines():
        m = re.search(r"print\(.*\)\s+# (.+)$", line)
        if m:
            expected.append(m.group(1))
        elif line.startswith("# ") and expected is not None and code.find(line) > 0:
            prev = code[: code.find(line)].rstrip().splitlines()[-1]
            if prev.startswith("print("):
                expected.append(line[2:])
    assert len(expected) == 3  # the three printed lines the README shows
    out = io.StringIO()
    with contextlib.redirect_stdout(out):
        exec(compile(code, "README.md", "exec"), {})
    assert out.getvalue().splitlines() == expected
