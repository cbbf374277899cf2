"""The sensitivity sweep: every eligible site swapped alone, per candidate, calibrated, measured.

Sits between report and api: it runs the pipeline's lower layers (plan,
calibrate, rewrite, check) once per candidate, in parallel, and hands the
automatic plan (:mod:`swapper.plan.search`) its numbers. Start at
:mod:`swapper.sweep.run`; the JSON it writes is documented in
:mod:`swapper.sweep.schema`.
"""
