"""Planning a run: check its inputs, write its hand-off files, decide which ROIs to (re)do.

Nothing here washes pixels. :func:`check_inputs` reads and checks everything a run
needs without writing anything; :func:`write_run_files` writes the self-contained recipe
copy (and the spillover matrix and stains beside it); :func:`plan_jobs` compares each ROI
with its latest ledger record and returns a :class:`Job` for every ROI that is not
already done.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING

from .._version import __version__
from ..errors import InputError
from ..files import reached_inputs, sweep_leftovers, write_atomic
from ..ledger import RECIPE, SPILLOVER_COPY, STAINS_COPY, latest_records, read_ledger
from ..table import BATCHES
from .batches import (
    SampleInputs,
    check_samples,
    job_spillover,
    with_matrix_column,
    write_sample_files,
)
from .folder import check_run_folder
from .handoff import check_markers

if TYPE_CHECKING:  # typing only: these modules load when a run starts
    from ..io import OutputSettings
    from ..recipe import Recipe
    from ..spillover import SpilloverMatrix


@dataclasses.dataclass(frozen=True)
class Job:
    """One ROI of a run to wash: only paths, hashes and numbers, so it pickles small.

    Attributes
    ----------
    roi : str
        The ROI's id (its path relative to the cohort, POSIX separators, no image suffix).
    input : Path
        The raw ROI.
    out_dir : Path
        The run folder.
    output : str or None
        The washed stack's name in the run folder; None when the recipe writes no stacks
        (quality only).
    recipe : Path
        The run's recipe copy; ``recipe_sha256`` is its hash when planned.
    spillover, stains : Path or None
        The run's copies of the spillover matrix and the stain sheet, with their hashes.
    input_sha256 : str or None
        The input's hash when planning already computed it.
    threads : int or None
        Threads for the ROI's chunks (None: the worker's share of its cores).
    staging_dir : Path or None
        Folder for the staging files instead of the output's folder.
    sample : tuple of (str, str)
        The ROI's row of the sample sheet (``batch`` and further columns), empty without one.
    """

    roi: str
    input: Path
    out_dir: Path
    output: str | None
    recipe: Path
    recipe_sha256: str
    spillover: Path | None = None
    spillover_sha256: str | None = None
    stains: Path | None = None
    stains_sha256: str | None = None
    input_sha256: str | None = None
    threads: int | None = None
    staging_dir: Path | None = None
    sample: tuple[tuple[str, str], ...] = ()


@dataclasses.dataclass(frozen=True)
class RunInputs:
    """Everything a run needs, read and checked (:func:`check_inputs`); nothing written yet."""

    cohort_dir: Path
    out_dir: Path
    rois: list[tuple[str, Path]]  # (name, input path), sorted by name
    recipe: Recipe
    matrix: SpilloverMatrix | None  # None without compensation
    stains_text: str | None  # the stain sheet as the run's stains.csv will hold it
    samples: SampleInputs | None = None  # the sample sheet, matched with the ROIs


@dataclasses.dataclass(frozen=True)
class Plan:
    """A run's inputs once its hand-off files are written (:func:`write_run_files`)."""

    cohort_dir: Path
    out_dir: Path
    rois: list[tuple[str, Path]]  # (name, input path), sorted by name
    recipe_path: Path
    recipe_sha256: str
    output_settings: OutputSettings
    spillover_path: Path | None
    spillover_sha256: str | None
    stains_path: Path | None
    stains_sha256: str | None
    samples: Mapping[str, dict] = dataclasses.field(default_factory=dict)  # ROI id -> sample row
    batch_spillover: Mapping[str, tuple[Path, str]] = dataclasses.field(default_factory=dict)


def check_inputs(cohort_dir, out_dir, *, recipe, spillover, stains, samples=None) -> RunInputs:
    """Read and check everything a run needs, writing nothing."""
    from ..io import list_cohort, output_name, read_stains, roi_id
    from ..recipe import Recipe, load_recipe

    cohort_dir = Path(cohort_dir).absolute()
    out = Path(out_dir).absolute()
    inputs = list_cohort(cohort_dir, skip=[out])
    if out.exists() and not out.is_dir():
        raise InputError(out, "output folder is a file")
    given = [cohort_dir, recipe if isinstance(recipe, (str, Path)) else None,
             spillover if isinstance(spillover, (str, Path)) else None,
             stains if isinstance(stains, (str, Path)) else None]
    if not isinstance(recipe, Recipe):
        recipe = load_recipe(recipe)
    given += [recipe.spillover_path(), *recipe.batch_spillover_paths().values()]
    names: dict[str, Path] = {}
    for path in inputs:
        name = roi_id(path, cohort_dir)
        if name in names:
            raise InputError(path, f"two ROIs share the id {name!r} ({names[name].name}); "
                             "their outputs would collide")
        names[name] = path

    if stains is None and (cohort_dir / "stains.csv").is_file():
        stains = cohort_dir / "stains.csv"
    stains_text = stains_obj = None
    if stains is not None:
        stains_obj = stains if not isinstance(stains, (str, Path)) else read_stains(stains)
        stains_text = _stains_csv(stains_obj)
    sample_inputs = check_samples(cohort_dir, sorted(names.items()), samples, recipe)
    extra = [BATCHES, *sample_inputs.outputs()] if sample_inputs is not None else []
    if sample_inputs is not None:
        given += sample_inputs.inputs()
    handoff = check_markers(recipe, stains_obj, inputs[0] if inputs else None, sorted(names))
    check_run_folder(out, reached_inputs(given),
                     [output_name(n, recipe.output) for n in names] + extra + handoff)
    matrix = _spillover_matrix(spillover, recipe)
    sample_inputs = with_matrix_column(sample_inputs, SPILLOVER_COPY if matrix is not None else "")
    return RunInputs(cohort_dir=cohort_dir, out_dir=out, rois=sorted(names.items()),
                     recipe=recipe, matrix=matrix, stains_text=stains_text, samples=sample_inputs)


def write_run_files(inputs: RunInputs) -> Plan:
    """Write the self-contained recipe copy (and its spillover matrix and stains) of a run."""
    from ..io import sha256_path
    from ..recipe import load_recipe

    out, recipe, matrix, stains_text = inputs.out_dir, inputs.recipe, inputs.matrix, inputs.stains_text
    spillover_path = stains_path = None
    changes = {"spillover": ""}
    if matrix is not None:
        from ..spillover import write_spillover

        spillover_path = write_spillover(out / SPILLOVER_COPY, matrix)
        changes["spillover"] = SPILLOVER_COPY
    if stains_text is not None:
        stains_path = out / STAINS_COPY
        if not stains_path.is_file() or stains_path.read_text(encoding="utf-8") != stains_text:
            write_atomic(stains_path, stains_text)
    run_recipe = dataclasses.replace(recipe.replace("compensation", **changes), source=out / RECIPE)
    # every batch's own matrix, from the sheet or the recipe, named by its copy beside the recipe
    run_recipe = run_recipe.with_batch_spillover(dict(inputs.samples.copies) if inputs.samples else {})
    text = run_recipe.to_toml()
    if not (out / RECIPE).is_file() or (out / RECIPE).read_text(encoding="utf-8") != text:
        write_atomic(out / RECIPE, text)
    if load_recipe(out / RECIPE).sha256() != run_recipe.sha256():  # the copy must say the same
        raise RuntimeError("the written recipe does not read back identically")
    batch_spillover = write_sample_files(out, inputs.samples)
    return Plan(
        cohort_dir=inputs.cohort_dir, out_dir=out, rois=inputs.rois, recipe_path=out / RECIPE,
        recipe_sha256=run_recipe.sha256(), output_settings=run_recipe.output,
        spillover_path=spillover_path,
        spillover_sha256=sha256_path(spillover_path) if spillover_path else None,
        stains_path=stains_path, stains_sha256=sha256_path(stains_path) if stains_path else None,
        samples=dict(inputs.samples.rows) if inputs.samples is not None else {},
        batch_spillover=batch_spillover)


def _spillover_matrix(spillover, recipe):
    """The spillover matrix to use (read and checked), or None without compensation."""
    from ..spillover import SpilloverMatrix, check_spillover, read_spillover

    if not recipe.compensation.enabled:
        return None
    if spillover is None:
        spillover = recipe.spillover_path()
    if spillover is None:
        return None
    if isinstance(spillover, SpilloverMatrix):
        check_spillover(spillover)
        return spillover
    return read_spillover(spillover)


def _stains_csv(stains) -> str:
    from ..io.stains import stains_text

    return stains_text(stains)


def plan_jobs(plan: Plan, log, *, staging_dir=None, verify: bool = False) -> tuple[list[Job], list[str]]:
    """The ROIs to wash (as jobs) and the names of those that can be skipped.

    An ROI recorded ``done`` is skipped when its input and output still have the size and
    modification time recorded when it was washed (``stat`` only, no read), or, with
    ``verify=True`` (or for a record without them), when both still hash to the recorded
    SHA-256. A file changed in place that keeps its size and time is only caught by
    ``verify``.
    """
    from ..io import output_name, sha256_path

    latest = latest_records(read_ledger(plan.out_dir))
    jobs, skipped = [], []
    enabled = plan.output_settings.enabled
    for name, path in plan.rois:
        output = output_name(name, plan.output_settings) if enabled else None
        _make_subfolder(plan.out_dir, output_name(name))
        sample = plan.samples.get(name)
        spill, spill_sha = job_spillover(plan.batch_spillover, sample,
                                         (plan.spillover_path, plan.spillover_sha256))
        job = Job(
            roi=name, input=Path(path), out_dir=plan.out_dir, output=output,
            recipe=plan.recipe_path, recipe_sha256=plan.recipe_sha256,
            spillover=spill, spillover_sha256=spill_sha,
            stains=plan.stains_path, stains_sha256=plan.stains_sha256,
            staging_dir=Path(staging_dir) if staging_dir is not None else None,
            sample=tuple((sample or {}).items()))
        record = latest.get(name)
        why = _why_redo(record, job)
        if why is None and not verify and _stamps_match(record, path, plan.out_dir, output):
            skipped.append(name)
            continue
        if why is None:
            job = dataclasses.replace(job, input_sha256=sha256_path(path))
            if job.input_sha256 != record.get("input_sha256"):
                why = "input changed"
            elif output is not None and sha256_path(plan.out_dir / output) != record.get("output_sha256"):
                why = "output changed or torn"
        if why is None:
            skipped.append(name)
            continue
        if record is not None:
            log.line(f"{name}: redo ({why})")
        jobs.append(job)
    return jobs, skipped


def _make_subfolder(out_dir: Path, name: str) -> None:
    """The run folder mirrors the cohort's tree: create an ROI's subfolder, sweep its leftovers."""
    folder = (out_dir / name).parent
    if folder != out_dir:
        folder.mkdir(parents=True, exist_ok=True)
        sweep_leftovers(folder)  # under the run's lock, as for the run folder itself


def _stamps_match(record: Mapping, input_path: Path, out_dir: Path, output: str | None) -> bool:
    """True when the input and output have the size and time recorded (no file is read).

    False when the record has no stamps (written by an older plexwash): the hashes decide.
    """
    from ..io import file_stamp

    recorded = record.get("input_stamp"), record.get("output_stamp")
    if not isinstance(recorded[0], Mapping) or (output is not None and not isinstance(recorded[1], Mapping)):
        return False
    try:
        if _stamp_key(file_stamp(input_path)) != _stamp_key(recorded[0]):
            return False
        return output is None or _stamp_key(file_stamp(out_dir / output)) == _stamp_key(recorded[1])
    except OSError:
        return False


def _stamp_key(stamp: Mapping) -> tuple:
    return tuple(stamp.get(k) for k in ("size", "mtime_ns", "files"))


def _why_redo(record: Mapping | None, job: Job) -> str | None:
    """Why an earlier record does not cover the job (None: it may, if the hashes still match)."""
    if record is None:
        return "not washed yet"
    if record.get("status") != "done":
        return f"last attempt {record.get('status')}"
    for key, what in (("recipe_sha256", "recipe"), ("spillover_sha256", "spillover matrix"),
                      ("stains_sha256", "stains"), ("output", "output format")):
        if record.get(key) != getattr(job, key):
            return f"{what} changed"
    if record.get("version") != __version__:
        return "plexwash version changed"
    if job.output is not None and not (job.out_dir / job.output).exists():
        return "output missing"
    return None
