"""Hydra's basic (grid) sweeper without its second composition of every job.

Hydra's basic sweeper composes every job's config once to check the batch and
then again to run it, which on evenflag's config tree costs about 0.3 s per
job. ``evenflag run`` composes and checks every swept value before the launch
(runner/app.py), so this sweeper skips Hydra's check and each job is composed
once. `evenflag run` picks it for every grid sweep (runner/app.py). Its
launcher composes each job from the last job with the same config-group
choices (reusing_loader.py), which cuts the remaining composition to a copy.
"""

from hydra._internal.core_plugins.basic_sweeper import BasicSweeper

from evenflag.runner.reusing_loader import reusing_context
from evenflag.runner.warm import wait_for_warm_up


class CheckedSweeper(BasicSweeper):
    def setup(self, *, hydra_context, task_function, config) -> None:
        super().setup(hydra_context=reusing_context(hydra_context), task_function=task_function, config=config)

    def validate_batch_is_legal(self, batch) -> None:
        # Checked by evenflag run before the launch. Called just before the
        # batch is launched: the parallel launcher's workers end their warm-up
        # (runner/warm.py) before its Parallel call takes them over.
        wait_for_warm_up()
