"""skymoments' ``trials`` sweeper for Hydra: an Optuna search launched through any launcher.

Pick it with ``hydra/sweeper=trials`` (the ``hparams_search`` configs do). Hydra finds it
because ``hydra_plugins`` is a namespace package on the path.
"""
