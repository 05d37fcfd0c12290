"""Training runs: the loop, optimiser and schedule, checkpoints and exact resume, run records.

``run_training(cfg, out_dir)`` trains one config into one run dir and returns its summary;
``train_from_cli`` is the ``blockyard train`` command (exit codes 0 done, 2 bad input,
3 diverged, 130/143 interrupted by SIGINT/SIGTERM).
"""

from blockyard.train.loop import default_run_dir, evaluate, run_training, train_from_cli, train_step

__all__ = ["default_run_dir", "evaluate", "run_training", "train_from_cli", "train_step"]
