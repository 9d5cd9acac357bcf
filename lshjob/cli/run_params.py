"""The command-line options of ``lshjob run``, made from the declared table
(:data:`lshjob.jobs.options.RUN_TABLE`): names, types, help and ``[default: ...]`` texts.

Every option's command-line default is None, "not given", so that a configuration file can
give it; the value a run gets when neither does is the table's default
(:func:`lshjob.jobs.options.defaults`, merged by :func:`lshjob.jobs.config.merge_settings`).
"""

from __future__ import annotations

import inspect
from typing import Annotated

import typer

from lshjob.jobs.options import RUN_TABLE, Option


def parameter(option: Option) -> inspect.Parameter:
    """The typer parameter of one declared option."""
    if option.argument:
        info = typer.Argument(help=option.help_text)
    else:
        names = (option.flag, option.short) if option.short else (option.flag,)
        info = typer.Option(*names, help=option.help_text)
    return inspect.Parameter(option.name, inspect.Parameter.POSITIONAL_OR_KEYWORD, default=None,
                             annotation=Annotated[option.type | None, info])


def with_run_options(command):
    """Give ``command`` (which takes the options as ``**flags``) the declared run options as
    its command-line parameters, in the table's order, before its own parameters."""
    own = [p for p in inspect.signature(command, eval_str=True).parameters.values()
           if p.kind is not inspect.Parameter.VAR_KEYWORD]
    command.__signature__ = inspect.Signature([*(parameter(o) for o in RUN_TABLE), *own])
    return command
