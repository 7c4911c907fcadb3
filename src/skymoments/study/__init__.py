"""The study: the science steps the commands run (training, baselines, evaluation, re-evaluation).

Commands under :mod:`skymoments.commands` are thin Hydra tasks over these modules; nothing
here imports a command.
"""
