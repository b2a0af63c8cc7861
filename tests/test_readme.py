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
