"""Reading a password on the command line: hidden at a terminal, one line from standard input otherwise
(scripts, tests), never echoed, logged or kept."""

from __future__ import annotations

import sys

import click


def read_password(prompt: str, *, confirm: bool = False) -> str:
    if sys.stdin is not None and sys.stdin.isatty():
        return click.prompt(
            prompt, hide_input=True, confirmation_prompt=confirm, err=True, default="", show_default=False
        )
    line = sys.stdin.readline() if sys.stdin is not None else ""
    return line.rstrip("\r\n")
