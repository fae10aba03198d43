"""The README's Python examples run as written (in order, one shared namespace)."""

import re
from pathlib import Path

README = Path(__file__).resolve().parents[1] / "README.md"


def test_readme_python_examples_run(capsys):
    blocks = re.findall(r"```python\n(.*?)```", README.read_text(), flags=re.S)
    assert len(blocks) >= 2, "README lost its Python examples"
    namespace = {}
    for block in blocks:
        exec(compile(block, str(README), "exec"), namespace)  # noqa: S102 (our own README)
    assert namespace["K"].shape == (100, 100)
    # the estimator example: a kept candidate, its reason printed, and a real score
    chosen, score = namespace["model"][-1].chosen_, namespace["model"].score(
        namespace["X_test"], namespace["y_test"])
    printed = capsys.readouterr().out
    assert chosen in printed and "inner-CV accuracy" in printed
    # scikit-learn breast cancer: SVMs reach about 0.95 on it (from memory); 0.85 is a floor
    assert 0.85 < score <= 1.0
