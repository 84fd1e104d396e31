"""Running a study file: :func:`load_study` and :class:`Study`.

Reading and checking a study file is the inputs' business (``dyadperm.inputs.study_file``,
where the file format is described); a :class:`Study` adds ``run``, which passes the file's
settings (overridden by the arguments given) to :func:`dyadperm.regress` or
:func:`dyadperm.correlate`.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from . import api as _api
from .inputs.study_file import StudyInputs, _arg_error, _integer, read_study
from .settings import check_ci, stop_rule

__all__ = ["Study", "load_study"]


class Study(StudyInputs):
    """A validated study, ready to run (see ``StudyInputs`` for its attributes)."""

    def run(self, *, permutations: int | None = None, seed: int | None = None,
            jobs: int | None = None, out: str | Path | None = None, progress: Any = False,
            chunk_size: int | None = None, backend: str = "threads",
            scheduler: str | None = None, shard: str | None = None, stop: str | None = None,
            stop_exceedances: int | None = None, stop_risk: float | None = None,
            ci: Any = None) -> Any:
        """Run the study with the engine; arguments left as None use the file's settings.

        Parameters
        ----------
        permutations : int, optional
            Number of random relabellings (>= 1).
        seed : int, optional
            Entropy for the permutation streams (>= 0).
        jobs : int, optional
            Workers (>= 1, or -1 for all cores); default the file's ``jobs``, else every
            core.
        out : str or Path, optional
            Run file; default ``[output] file`` (or no run file).
        progress : bool or callable(done, total)
            Progress callback (the CLI passes its progress bar).
        chunk_size : int, optional
            Permutations per chunk (>= 1).
        backend, scheduler, shard : str, optional
            Where chunks run ("threads", "processes", "dask" with a scheduler address) and
            which shard "i/N" of the chunks to compute (see ``dyadperm.regress``).
        stop, stop_exceedances, stop_risk : optional
            Sequential stopping rule and its settings (see ``dyadperm.pipeline.stopping``);
            a setting given without ``stop`` applies to the file's rule.
        ci : float or False, optional
            Level of the coefficient intervals (regressions); False: none. Default: the
            file's ``ci`` (0.95 when it sets none).

        Returns
        -------
        The engine's result of ``dyadperm.regress`` (kind = regression) or
        ``dyadperm.correlate`` (kind = correlation).
        """
        t = self.spec["test"]
        if permutations is not None:
            permutations = _integer(permutations, 1, None, _arg_error("permutations"))
        if seed is not None:
            seed = _integer(seed, 0, None, _arg_error("seed"))
        if jobs is not None:
            jobs = _integer(jobs, 1, -1, _arg_error("jobs"))
        if chunk_size is not None:
            chunk_size = _integer(chunk_size, 1, None, _arg_error("chunk_size"))
        rule = t["stop"] if stop is None else stop
        same_rule = rule == t["stop"]
        rule = stop_rule(
            rule, alpha=t["alpha"],
            exceedances=stop_exceedances if stop_exceedances is not None or not same_rule
            else t["stop_exceedances"],
            risk=stop_risk if stop_risk is not None or not same_rule else t["stop_risk"])
        common = dict(
            permutations=t["permutations"] if permutations is None else permutations,
            seed=t["seed"] if seed is None else seed,
            jobs=jobs if jobs is not None else -1 if t["jobs"] is None else t["jobs"],
            directed=self.spec["study"]["directed"],
            groups=self.groups,
            dyads=t["dyads"],
            exact=t["exact"],
            chunk_size=t["chunk_size"] if chunk_size is None else chunk_size,
            out=self.output if out is None else Path(out),
            progress=progress,
            backend=backend,
            scheduler=scheduler,
            shard=shard,
            provenance={"study_text": self.text, "study_path": str(self.path)},
            stop=rule,
        )
        return self._engine(common, ci=ci)

    def _engine(self, common: dict, *, ci: Any = None) -> Any:
        """``dyadperm.regress`` (or ``correlate``) of the study's networks with the file's
        model, storage and intervals and the run settings ``common`` (their keyword
        arguments): what ``run`` calls, and the timing run of ``planning.plan_study``, so
        that one times what the other runs."""
        t = self.spec["test"]
        response, predictors = self.response, self.predictors
        if self.layers_in_place:
            # the run may standardise the layers in place (even a failed one, part way):
            # whoever reads the networks next gets them from the files again
            self._spent = True
        common = dict(common, storage=t["storage"], overwrite_inputs=self.layers_in_place)
        if t["kind"] == "correlation":
            (predictor,) = predictors.values()
            return _api.correlate(response, predictor, method=t["method"], **common)
        return _api.regress(response, dict(predictors), model=t["model"],
                            scheme=t["scheme"], statistic=t["statistic"],
                            ci=t["ci"] if ci is None else check_ci(ci), **common)


def load_study(path: str | Path, *, storage: str | None = None) -> Study:
    """Read, validate and load a study file (see ``dyadperm.inputs.study_file.read_study``
    for what is checked and the errors raised). ``storage`` ("float64" or "float32")
    overrides the file's ``[test] storage``: the layers the networks are loaded into."""
    return read_study(path, cls=Study, storage=storage)
