"""`tonebench bench check`: every role of a bench file opened, identified and queried, RF left off."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from tonebench.cli.common import err, one_line_errors, out

bench_app = typer.Typer(rich_markup_mode=None, no_args_is_help=True,
                        help="Bench files: check that every role is the instrument it should be.")


def register_bench_commands(app: typer.Typer) -> None:
    app.add_typer(bench_app, name="bench")


@bench_app.command("check")
def check(
    bench: Annotated[Path, typer.Option("--bench", "-b", help="Bench file (TOML) to check.")],
) -> None:
    """Open every role, print its *IDN?, dialect, limits in force and present state, and say what is
    wrong with any role that does not fit (exit 2). Nothing is switched on; RF is off at the end."""
    from tonebench.config.bench_file import load_bench
    from tonebench.run.bench_check import check_bench

    with one_line_errors():
        loaded = load_bench(bench)
        result = check_bench(loaded, warn=lambda line: err.print(f"warning: {line}", markup=False, highlight=False))
    kind = "simulated bench" if loaded.settings.simulated else "bench"
    say(f"{kind} {loaded.settings.bench.name} ({bench}), VISA library {result.library}")
    for role in result.roles:
        say(f"\n{role.role}: {role.resource}, dialect {role.dialect}")
        if role.idn is not None:
            say(f"  identity  {role.idn}")
        for line in role.limits:
            say(f"  limit     {line}")
        for line in role.state:
            say(f"  state     {line}")
        if role.problem is not None:
            say(f"  PROBLEM   {role.problem}")
    say("")
    for line in result.bench_limits:
        say(line)
    problems = [role.role for role in result.roles if role.problem is not None]
    if problems:
        err.print(f"error: {len(problems)} role(s) do not fit: {', '.join(problems)}", markup=False, highlight=False)
        raise typer.Exit(2)
    say(f"all {len(result.roles)} roles answer as their dialects expect; RF is off at both sources")


def say(line: str) -> None:
    out.print(line, markup=False, highlight=False)
