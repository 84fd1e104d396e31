"""The ``dyadperm`` command line (Typer). Thin: parse options, call one function, print.

Exit codes: 0 done; 1 the run failed; 2 bad input or usage (one line on stderr naming
the file, row/column or setting at fault; ``--debug`` shows the traceback instead).
"""

from __future__ import annotations

import json
import sys
import time
import warnings
from pathlib import Path
from typing import Optional

import typer

from .calibrate import calibrate_study, check_plot_path
from .demo import write_demo
from .errors import DyadpermError, InputError, NumericalError, RunFileError
from .inputs.describe import describe_study
from .output.report import make_report
from .pipeline import store
from .planning import plan_study
from .settings import check_output_file
from .study import load_study

app = typer.Typer(add_completion=False, no_args_is_help=True, pretty_exceptions_enable=False,
                  help="Permutation tests (QAP, MRQAP) for network data.")

_state = {"debug": False}


@app.callback()
def _main(debug: bool = typer.Option(False, "--debug", help="Show tracebacks on errors.")) -> None:
    _state["debug"] = debug


def _say(msg: str) -> None:
    typer.echo(msg, err=True)


class Progress:
    """A one-line progress bar on stderr: permutations done, rate, time left."""

    def __init__(self, label: str = "permutations") -> None:
        self.label = label
        self.t0 = time.perf_counter()
        self.last = 0.0
        self.base: int | None = None

    def __call__(self, done: int, total: int) -> None:
        now = time.perf_counter()
        if self.base is None:
            self.base = done if done < total else 0
            self.t0 = now
        if now - self.last < 0.2 and done < total:
            return
        self.last = now
        rate = (done - self.base) / max(now - self.t0, 1e-9)
        left = (total - done) / rate if rate > 0 else float("inf")
        width = 30
        fill = int(width * done / max(total, 1))
        eta = f"{left:5.0f}s left" if left != float("inf") else "  ...   "
        sys.stderr.write(f"\r{self.label} [{'#' * fill}{'.' * (width - fill)}] {done:,}/{total:,}"
                         f"  {rate:,.0f}/s  {eta}")
        if done >= total:
            sys.stderr.write("\n")
        sys.stderr.flush()


def _progress(progress: Optional[bool]):
    show = sys.stderr.isatty() if progress is None else progress
    return Progress() if show else False


_STOP_HELP = ("Sequential stopping: none, besag-clifford or gandy (overrides the study "
              "file).")
_STOP_H_HELP = "besag-clifford: exceedances h that end a term (default 10)."
_STORAGE_HELP = ("Layers in float64 or float32 (overrides the file's [test] storage); float32 "
                 "halves memory and traffic, sums stay float64.")
_CI_HELP = ("Level of the coefficient intervals, e.g. 0.9 (overrides the file; 0: none). "
            "Intervals invert the scheme's own test (dsp, freedman-lane).")
_STOP_RISK_HELP = ("gandy: bound on the chance of a decision at alpha other than an "
                   "infinite run's (default 0.001).")


def _print_result(res, as_json: bool) -> None:
    if as_json:
        typer.echo(json.dumps(res.to_dict(), indent=2))
    else:
        typer.echo(res.table())


@app.command()
def run(
    study: Path = typer.Argument(..., help="Study file (TOML)."),
    permutations: Optional[int] = typer.Option(None, help="Random relabellings (overrides the file)."),
    seed: Optional[int] = typer.Option(None, help="Seed entropy (overrides the file)."),
    jobs: Optional[int] = typer.Option(None, help="Workers; -1 uses every core."),
    out: Optional[Path] = typer.Option(None, help="Run file to write (HDF5)."),
    backend: str = typer.Option("threads", help="threads, processes or dask."),
    scheduler: Optional[str] = typer.Option(None, help="Dask scheduler address (with --backend dask)."),
    shard: Optional[str] = typer.Option(None, help="Compute shard i/N of the chunks into --out."),
    chunk_size: Optional[int] = typer.Option(None, help="Permutations per chunk."),
    progress: Optional[bool] = typer.Option(None, "--progress/--quiet",
                                            help="Progress bar (default: on a terminal)."),
    as_json: bool = typer.Option(False, "--json", help="Print the result as JSON."),
    stop: Optional[str] = typer.Option(None, help=_STOP_HELP),
    stop_exceedances: Optional[int] = typer.Option(None, help=_STOP_H_HELP),
    stop_risk: Optional[float] = typer.Option(None, help=_STOP_RISK_HELP),
    ci: Optional[float] = typer.Option(None, help=_CI_HELP),
    storage: Optional[str] = typer.Option(None, help=_STORAGE_HELP),
) -> None:
    """Run a study and print its table (and keep a run file with --out)."""
    if out is not None:  # before the networks are read
        check_output_file(out, "run file")
    st = load_study(study, storage=storage)
    target = out if out is not None else st.output
    if target is not None and Path(target).exists():
        raise RunFileError(f"{target}: run file exists; resume it or add permutations with "
                           f"`dyadperm extend {target}`, or remove it")
    if shard is not None and target is None:
        raise InputError("--shard needs --out (or [output] file): each shard writes its own run file")
    res = st.run(permutations=permutations, seed=seed, jobs=jobs, out=target,
                 progress=_progress(progress), chunk_size=chunk_size,
                 backend=backend, scheduler=scheduler, shard=shard, stop=stop,
                 stop_exceedances=stop_exceedances, stop_risk=stop_risk,
                 ci=False if ci == 0 else ci)
    for note in st.notes:
        _say(f"note: {note}")
    if shard is not None:
        typer.echo(f"shard {shard} written to {target}; join the shards with "
                   f"`dyadperm merge OUT.h5 SHARD.h5 ...`")
        return
    _print_result(res, as_json)


@app.command()
def extend(
    run_file: Path = typer.Argument(..., help="Run file of a study run (finished or interrupted)."),
    permutations: Optional[int] = typer.Option(None, help="New total (default: finish the planned total)."),
    jobs: Optional[int] = typer.Option(None, help="Workers; -1 uses every core."),
    backend: str = typer.Option("threads", help="threads, processes or dask."),
    scheduler: Optional[str] = typer.Option(None, help="Dask scheduler address."),
    progress: Optional[bool] = typer.Option(None, "--progress/--quiet"),
    as_json: bool = typer.Option(False, "--json", help="Print the result as JSON."),
    stop: Optional[str] = typer.Option(None, help=_STOP_HELP + " 'none' computes every "
                                       "planned permutation of a stopped run."),
    stop_exceedances: Optional[int] = typer.Option(None, help=_STOP_H_HELP),
    stop_risk: Optional[float] = typer.Option(None, help=_STOP_RISK_HELP),
    storage: Optional[str] = typer.Option(None, help="float64 or float32 (default: the run "
                                          "file's; another one is refused)."),
) -> None:
    """Finish the missing chunks of a run, then add permutations up to --permutations."""
    hdr = store.read_header(run_file)
    if not hdr.study_path:
        raise RunFileError(f"{run_file}: was made from Python, not a study file; extend it by "
                           "calling dyadperm.regress with the same inputs and out=")
    if hdr.shard:
        raise RunFileError(f"{run_file}: is shard {hdr.shard}; join the shards with "
                           "`dyadperm merge` first")
    study_path = Path(hdr.study_path)
    if not study_path.exists():
        raise RunFileError(f"{run_file}: its study file {study_path} is gone")
    if study_path.read_text(encoding="utf-8") != hdr.study_text:
        raise RunFileError(f"{run_file}: study file {study_path} changed since the run was made")
    total = hdr.permutations if permutations is None else permutations
    if total < hdr.permutations:
        raise InputError(f"--permutations: the run already has {hdr.permutations}; ask for at "
                         "least that many")
    seed = hdr.identity.get("seed")
    st = load_study(study_path, storage=storage if storage is not None
                    else hdr.identity.get("storage", "float64"))
    res = st.run(permutations=total, seed=None if seed is None else int(seed), jobs=jobs,
                 out=run_file, progress=_progress(progress), chunk_size=hdr.chunk_size,
                 backend=backend, scheduler=scheduler, stop=stop,
                 stop_exceedances=stop_exceedances, stop_risk=stop_risk)
    _print_result(res, as_json)


@app.command()
def merge(
    out: Path = typer.Argument(..., help="Run file to write."),
    shards: list[Path] = typer.Argument(..., help="Shard run files."),
) -> None:
    """Join shard run files of one run, after checking they belong together."""
    if out.exists():
        raise RunFileError(f"{out}: exists; choose a new file for the merged run")
    check_output_file(out, "run file")
    hdr = store.merge(out, shards)
    typer.echo(f"merged {len(shards)} shards ({hdr.permutations:,} permutations) into {out}")


@app.command()
def report(
    run_file: Path = typer.Argument(..., help="Run file."),
    as_json: bool = typer.Option(False, "--json", help="Print the result (and provenance) "
                                 "as JSON."),
    csv_file: Optional[Path] = typer.Option(None, "--csv", help="Write one row per term to "
                                            "this CSV file."),
    plots: Optional[Path] = typer.Option(None, "--plots", help="Write PNG plots into this "
                                         "folder."),
    html_file: Optional[Path] = typer.Option(None, "--html", help="Write a self-contained "
                                             "HTML report to this file."),
    alpha: Optional[float] = typer.Option(None, help="Level the report marks results at "
                                          "(default: the run's)."),
) -> None:
    """Print the result table of a run file; write CSV, plots and HTML on request."""
    rep = make_report(run_file, as_json=as_json, csv_file=csv_file, plots=plots,
                      html_file=html_file, alpha=alpha)
    typer.echo(rep.text)
    for path in rep.written:
        _say(f"wrote {path}")


@app.command()
def plan(
    study: Path = typer.Argument(..., help="Study file (TOML)."),
    precision: float = typer.Option(..., help="Monte Carlo standard error wanted for a "
                                    "p-value at alpha (e.g. 0.002)."),
    alpha: Optional[float] = typer.Option(None, help="Level (default: the study's alpha)."),
    jobs: int = typer.Option(-1, help="Workers of the timing run and of the planned run; "
                             "-1 uses every core."),
) -> None:
    """Permutations needed for a Monte Carlo precision, and the time they take here."""
    typer.echo(plan_study(study, precision=precision, alpha=alpha, jobs=jobs).text())


@app.command()
def check(study: Path = typer.Argument(..., help="Study file (TOML)."),
          storage: Optional[str] = typer.Option(None, help=_STORAGE_HELP)) -> None:
    """Validate a study's inputs and describe what was read."""
    typer.echo(describe_study(study, storage=storage).text())


@app.command()
def demo(
    dir: Path = typer.Option(Path("dyadperm-demo"), "--dir", help="Folder to write the demo into."),
    jobs: int = typer.Option(-1, help="Workers; -1 uses every core."),
    progress: Optional[bool] = typer.Option(None, "--progress/--quiet"),
) -> None:
    """Write the invented irrigation-cooperative study and its data, then run it."""
    t0 = time.perf_counter()
    path = write_demo(dir)
    typer.echo(f"demo study written to {path}")
    st = load_study(path)
    res = st.run(jobs=jobs, progress=_progress(progress))
    typer.echo(f"{st.title}\n")
    typer.echo(res.table())
    typer.echo(f"\n(finished in {time.perf_counter() - t0:.1f} s; planted effects are listed "
               f"at the top of {path})")


@app.command()
def calibrate(
    study: Path = typer.Argument(..., help="Study file (TOML)."),
    replicates: int = typer.Option(200, help="Simulated responses per tested term."),
    permutations: int = typer.Option(199, help="Random relabellings per test."),
    alpha: Optional[float] = typer.Option(None, help="Level (default: the study's alpha)."),
    effect: Optional[float] = typer.Option(None, help="Standardised coefficient for a power "
                                           "study (sd of the response per sd of the term)."),
    seed: Optional[int] = typer.Option(None, help="Seed entropy (default: the study's seed)."),
    jobs: Optional[int] = typer.Option(None, help="Workers; -1 uses every core (default: the "
                                       "study file's jobs if it sets one, else every core)."),
    plot: Optional[Path] = typer.Option(None, help="Write the figure to this file (.png, .pdf, .svg)."),
    progress: Optional[bool] = typer.Option(None, "--progress/--quiet"),
    as_json: bool = typer.Option(False, "--json", help="Print the result as JSON."),
) -> None:
    """Size (and power) of each scheme on simulated responses that keep the study's design."""
    if plot is not None:
        check_plot_path(plot)
    bar = _progress(progress)
    if bar:
        bar.label = "replicates"
    res = calibrate_study(load_study(study), replicates=replicates, permutations=permutations,
                          alpha=alpha, effect=effect, seed=seed, jobs=jobs, progress=bar)
    _print_result(res, as_json)
    if plot is not None:
        typer.echo(f"figure written to {res.plot(plot)}")


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    _say(f"dyadperm: warning: {message}")


def _is_usage_error(exc: Exception) -> bool:
    """Typer ships its own copy of click in newer releases: match by the click base class."""
    return any(c.__name__ == "ClickException" for c in type(exc).__mro__) \
        and hasattr(exc, "format_message")


def main() -> None:
    """Console entry point: typed errors become one line and an exit code."""
    old = warnings.showwarning
    warnings.showwarning = _show_warning
    try:
        app(standalone_mode=False)
    except (InputError, RunFileError) as exc:
        if _state["debug"]:
            raise
        _say(f"dyadperm: error: {exc}")
        raise SystemExit(2) from None
    except (NumericalError, DyadpermError) as exc:
        if _state["debug"]:
            raise
        _say(f"dyadperm: error: {exc}")
        raise SystemExit(1) from None
    except typer.Abort:
        _say("dyadperm: aborted")
        raise SystemExit(1) from None
    except SystemExit:
        raise
    except Exception as exc:  # usage errors and anything unexpected
        if _is_usage_error(exc):
            _say(f"dyadperm: error: {exc.format_message()}")
            raise SystemExit(exc.exit_code) from None
        if _state["debug"]:
            raise
        _say(f"dyadperm: internal error: {type(exc).__name__}: {exc} (rerun with --debug for "
             "the traceback)")
        raise SystemExit(1) from None
    finally:
        warnings.showwarning = old


if __name__ == "__main__":  # pragma: no cover
    main()
