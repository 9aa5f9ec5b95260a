"""One experiment end to end: images -> displacement -> deflection -> density -> files.

Orchestration only.  The modules it strings together:

- :mod:`bos.settings`   experiment settings -> options of the stages
- :mod:`bos.stages`     the per-frame stages (shared by ``bos run``, ``bos batch``
  and phase-resolved processing): :func:`load_inputs`,
  :func:`measure_displacement`, :func:`reconstruct`, :func:`process_inputs`
- :mod:`bos.provenance` summary numbers and provenance attributes
- :mod:`bos.output`     the result file, profile CSV and figures

:func:`run_experiment` reads one pair and returns a :class:`RunResult`
(writes nothing); :func:`save_run` writes it.  The names below are
re-exported so ``bos.pipeline.X`` keeps working for notebooks.
"""

from __future__ import annotations

from .config import Experiment
from .output import (PROFILE_FIELDS, Y_DOWN_NOTE, as_result_data, output_paths, prepare_output_dir,  # noqa: F401
                     result_variables, sample_profile, save_run, write_profile_csv)
from .provenance import (_medium_dict, _rig_dict, _section_dict, _small_items, cautions,  # noqa: F401
                         invalid_flags, jsonable, summarize)
from .settings import (camera_motion_region, displacement_options, reference_mask,  # noqa: F401
                       region_box, window_schedule)
from .stages import (STAGES, Inputs, ProgressFn, RunResult, _tick, inputs_from_arrays,  # noqa: F401
                     load_inputs, measure_displacement, process_inputs, reconstruct, with_exif_defaults)


def run_experiment(exp: Experiment, *, progress: ProgressFn | None = None) -> RunResult:
    """Run every stage of one experiment and return the result (writes nothing).

    Parameters
    ----------
    exp : Experiment
        Validated experiment (see :func:`bos.config.load_experiment`).
    progress : callable, optional
        ``progress(stage, fraction)``, called as stages start and finish.

    Returns
    -------
    RunResult

    Raises
    ------
    BOSError subclasses
        Bad input at any stage (one-line messages).
    """
    _tick(progress, "read images", 0.0)
    inputs = load_inputs(exp)
    _tick(progress, "read images", 1.0)
    exp, exif_notes = with_exif_defaults(exp, inputs.exif)
    return process_inputs(inputs, exp, progress=progress, exif_notes=exif_notes)
