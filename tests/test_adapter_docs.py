"""docs/adapters.md stays true: its python blocks run, and it names every field.

The blocks are executed in order in one namespace (a block may use what an earlier one
defined), in this process with the installed package. The field lists come from the
dataclasses themselves (``dataclasses.fields``), so a field added to ``Capabilities``
or ``ErrorModel`` without a line in the doc fails here.
"""
from __future__ import annotations

import dataclasses
import os
import re

import pytest

from convwitness import Capabilities, ErrorModel
from convwitness.geometry.capabilities import MODEL_KEYS

DOC = os.path.join(os.path.dirname(__file__), os.pardir, "docs", "adapters.md")


def _text() -> str:
    with open(DOC, encoding="utf-8") as fh:
        return fh.read()


def python_blocks(text: str) -> list[str]:
    """The bodies of the ```python fenced blocks, in order."""
    return re.findall(r"^```python\n(.*?)^```", text, flags=re.S | re.M)


def test_the_doc_has_python_blocks():
    # control for the extraction: the doc has several runnable examples
    assert len(python_blocks(_text())) >= 6


def test_python_blocks_run(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)                 # an example that writes files writes here
    namespace: dict = {"__name__": "adapters_doc"}
    for i, block in enumerate(python_blocks(_text())):
        code = compile(block, f"docs/adapters.md block {i + 1}", "exec")
        exec(code, namespace)                   # noqa: S102 - the doc's own examples


@pytest.mark.parametrize("cls", [Capabilities, ErrorModel])
def test_every_field_is_documented(cls):
    text = _text()
    missing = [f.name for f in dataclasses.fields(cls) if f"`{f.name}`" not in text]
    assert not missing, f"docs/adapters.md does not mention {cls.__name__} field(s) {missing}"


def test_every_error_model_key_is_documented():
    text = _text()
    missing = [k for k in MODEL_KEYS if f"`{k}`" not in text]
    assert not missing, f"docs/adapters.md does not name error_models pass key(s) {missing}"


def test_readme_links_the_adapter_doc():
    with open(os.path.join(os.path.dirname(DOC), os.pardir, "README.md"), encoding="utf-8") as fh:
        assert "docs/adapters.md" in fh.read()
