"""The ``nenv`` command line: thin commands over the library, every usage error one line on stderr.

``app`` holds the application and what the commands share; each module registers its commands
on it (files: :mod:`nenv.cli.offline`; live audio: :mod:`nenv.cli.live`; training:
:mod:`nenv.cli.training`; listening panels: :mod:`nenv.cli.listening`), in the order ``--help`` lists them.
"""

from __future__ import annotations

import os
import sys

import typer

from nenv.cli import offline  # noqa: F401, I001  (each module registers its commands on app, in this order)
from nenv.cli import live, training, listening  # noqa: F401, E402
from nenv.cli.app import _say, app

__all__ = ["app", "main"]


def _is_usage_error(e: Exception) -> bool:
    """The command line library's usage errors (its UsageError family: exit status 2 and a message),
    recognised by what they carry rather than by a class the library keeps private in some versions."""
    return getattr(e, "exit_code", None) == 2 and callable(getattr(e, "format_message", None))


def main() -> None:
    """Console entry point: every usage error is one line on stderr with exit status 2."""
    if os.environ.get("NENV_DEBUG"):
        app()
        return
    try:
        status = app(standalone_mode=False)  # the command line library's errors come back here
    except typer.Abort:
        _say("nenv: interrupted; no partial output was left behind")
        sys.exit(130)
    except SystemExit:
        raise
    except Exception as e:
        if _is_usage_error(e):  # a bad value, a missing argument or option, an unknown option or command
            ctx = getattr(e, "ctx", None)
            if type(e).__name__ == "NoArgsIsHelpError" and ctx is not None:  # 'nenv' alone: the help, as before
                typer.echo(ctx.get_help())
                sys.exit(2)
            where = ctx.command_path if ctx is not None else "nenv"
            message = e.format_message().replace("Value error, ", "")
            if getattr(getattr(e, "param", None), "name", None) == "inputs":  # one path given: it was taken as the output
                message = "an input and an output are needed (extend CALL.wav CALL-WB.wav, or extend FOLDER... OUTDIR)"
            _say(f"nenv: error: {message} (see '{where} --help')")
            sys.exit(2)
        # a defect in nenv, not a user error: one line, not a traceback
        _say(f"nenv: internal error ({type(e).__name__}: {e}); rerun with NENV_DEBUG=1 for details and please report it")
        sys.exit(70)
    sys.exit(status if isinstance(status, int) else 0)
