"""The README's Python snippets run as written (each in a fresh namespace, in a scratch folder).

The data-parallel snippet starts torch.distributed itself; here it runs as a world of one process
(gloo on the loopback address), which is what its init_process_group call reads from the environment.
"""
from __future__ import annotations

import os
import re
import socket
import warnings
from pathlib import Path

import pytest
import torch.distributed as dist

README = Path(__file__).resolve().parents[1] / "README.md"


def python_snippets():
    text = README.read_text(encoding="utf-8")
    return re.findall(r"```python\n(.*?)```", text, flags=re.S)


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def test_the_readme_has_python_snippets():
    assert len(python_snippets()) >= 3


@pytest.mark.parametrize("index", range(len(python_snippets())))
def test_readme_snippet_runs(index, tmp_path, monkeypatch):
    code = python_snippets()[index]
    monkeypatch.chdir(tmp_path)
    if "init_process_group" in code:
        monkeypatch.setenv("MASTER_ADDR", "127.0.0.1")
        monkeypatch.setenv("MASTER_PORT", str(free_port()))
        monkeypatch.setenv("RANK", "0")
        monkeypatch.setenv("WORLD_SIZE", "1")
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            exec(compile(code, f"README.md snippet {index}", "exec"), {"__name__": "__readme__"})
    finally:
        if dist.is_available() and dist.is_initialized():
            dist.destroy_process_group()
    assert os.getcwd() == str(tmp_path)


def option_rows():
    """``{option: default cell}`` of the README's options table."""
    text = README.read_text(encoding="utf-8")
    table = text.split("### Options", 1)[1].split("\n\n", 2)[1]
    return dict(re.findall(r"^\| `(\w+)` \| (.*?) \|", table, flags=re.M))


def test_the_options_table_lists_every_keyword_with_its_default():
    # The table is what users read for defaults: a changed default must change it too.
    import ast
    import inspect

    from ngopt import FisherDescent

    rows = option_rows()
    parameters = inspect.signature(FisherDescent.__init__).parameters
    keywords = [name for name in parameters if name != "self"]
    assert sorted(rows) == sorted(keywords)
    checked = 0
    for name in keywords:
        default, cell = parameters[name].default, rows[name]
        if default is inspect.Parameter.empty or (default is None and not cell.startswith("`None`")):
            continue  # required, or None resolved to a documented value (lr by step rule, ...)
        literal = cell.split(":", 1)[0] if default is None else cell
        assert ast.literal_eval(literal.replace("`", "")) == default, (name, cell, default)
        checked += 1
    assert checked >= 20
