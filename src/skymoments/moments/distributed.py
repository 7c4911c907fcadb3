"""DDP from inside a Hydra job: relaunch the other ranks as the same job, not the same argv.

Lightning's ``strategy="ddp"`` starts ranks 1..N-1 of a node by running the current script
again (``_SubprocessScriptLauncher``), built from ``sys.argv``. Inside a ``skymoments`` Hydra
job that command is wrong twice over:

* the ``skymoments`` entry point strips the subcommand from ``sys.argv`` before Hydra parses
  it, so ``python -m skymoments.cli run ...`` is relaunched without ``run``;
* in a ``-m`` sweep ``sys.argv`` holds the whole sweep (``-m``, ``seed=0,1,2``): each rank
  would start the sweep again instead of joining its own job.

:class:`JobDDPStrategy` (what ``trainer.strategy: ddp`` becomes in
:func:`skymoments.moments.pipeline.train_moments`) relaunches each rank as *this job*:
``python -m skymoments.cli <subcommand> <the job's own overrides>`` with
``hydra.run.dir=<the job's output folder>``, in the launch folder. Where the cluster starts the
processes itself (SLURM ``srun``, ``torchrun``), nothing is relaunched, as in Lightning.
"""

from __future__ import annotations

import os
import subprocess
import sys

from lightning.fabric.strategies.launchers.subprocess_script import _basic_subprocess_cmd
from lightning.pytorch.strategies import DDPStrategy
from lightning.pytorch.strategies.launchers.subprocess_script import _SubprocessScriptLauncher

__all__ = ["JobDDPStrategy", "job_rank_command", "with_job_ddp"]

# Subcommands are Hydra tasks in skymoments.commands.<sub>; the entry point also names the
# running subcommand in sys.argv[0] ("skymoments run").
_COMMANDS_PREFIX = "skymoments.commands."
_ENTRY_PREFIX = "skymoments "
_RUN_JOB_FILE = os.path.join("hydra", "core", "utils.py")
# Output folder of the job whose ranks this process launched (one job per process).
_launched_for: str | None = None


def _quoted(value: str) -> str:
    for quote in ('"', "'"):
        if quote not in value:
            return f"{quote}{value}{quote}"
    raise ValueError(f"the job folder {value!r} holds both quote characters; rename it")


def _task_module() -> str | None:
    """The module of the running Hydra task function, read from Hydra's ``run_job`` frame.

    Every launcher (basic, joblib, submitit) calls the task through
    ``hydra.core.utils.run_job(task_function, ...)``, so that frame is on the stack while the
    job runs, whatever process it runs in.
    """
    frame = sys._getframe(1)
    while frame is not None:
        code = frame.f_code
        if code.co_name == "run_job" and code.co_filename.endswith(_RUN_JOB_FILE):
            task = frame.f_locals.get("task_function")
            return getattr(task, "__module__", None)
        frame = frame.f_back
    return None


def _entry_command() -> list[str]:
    """A command that starts the running Hydra app again (the overrides are added after it).

    ``python -m skymoments.cli <sub>`` for a skymoments subcommand (a task in
    ``skymoments.commands.<sub>``), whichever launcher started this process; otherwise
    Lightning's rule for one's own app: the ``__main__`` module or script.
    """
    module = _task_module() or ""
    if module.startswith(_COMMANDS_PREFIX):
        return [sys.executable, "-m", "skymoments.cli", module[len(_COMMANDS_PREFIX) :]]
    prog = sys.argv[0] if sys.argv else ""
    if prog.startswith(_ENTRY_PREFIX):
        return [sys.executable, "-m", "skymoments.cli", prog[len(_ENTRY_PREFIX) :].strip()]
    import __main__

    spec = getattr(__main__, "__spec__", None)
    if spec is None:
        return [sys.executable, os.path.abspath(prog)]
    return [sys.executable, "-m", spec.name]


def job_rank_command(local_rank: int) -> tuple[list[str], str]:
    """The command and working folder that start ``local_rank`` of the running Hydra job.

    Parameters
    ----------
    local_rank : int
        The rank on this node (1 .. devices - 1).

    Returns
    -------
    command : list of str
        ``[python, -m, skymoments.cli, <sub>, *job overrides, hydra.run.dir=..., ...]``.
    cwd : str
        The launch folder (``hydra.runtime.cwd``), so relative paths mean what they meant.
    """
    from hydra.core.hydra_config import HydraConfig

    hc = HydraConfig.get()
    command = _entry_command() + [str(o) for o in hc.overrides.task]
    command += [
        f"hydra.run.dir={_quoted(str(hc.runtime.output_dir))}",
        # The job's .hydra/ folder is rank zero's; another rank must not rewrite it.
        "hydra.output_subdir=null",
        f"hydra.job.name={hc.job.name}_rank{local_rank}",
        f"hydra.job.chdir={'true' if hc.job.chdir else 'false'}",
    ]
    return command, str(hc.runtime.cwd)


class _JobLauncher(_SubprocessScriptLauncher):
    """Lightning's subprocess launcher with :func:`job_rank_command` as the child command."""

    def launch(self, function, *args, trainer=None, **kwargs):
        global _launched_for
        job = _job_output_dir()
        if self.cluster_environment.creates_processes_externally:
            if _launched_for is not None and job != _launched_for:
                # LOCAL_RANK is still set from an earlier job of this process, whose ranks
                # are gone: joining them would wait forever.
                raise RuntimeError(
                    "trainer=ddp in a sweep needs one process per job, but this process "
                    "already ran a DDP job. Use hydra/launcher=submitit_local (or "
                    "submitit_slurm), which runs each job in its own process, or leave "
                    "trainer=ddp out of the sweep"
                )
        else:
            _launched_for = job
        return super().launch(function, *args, trainer=trainer, **kwargs)

    def _call_children_scripts(self) -> None:
        # As Lightning's (2.x): the same environment variables, another command.
        self._check_can_spawn_children()
        self.procs = []
        env = self.cluster_environment
        os.environ["MASTER_ADDR"] = env.main_address
        os.environ["MASTER_PORT"] = str(env.main_port)
        os.environ["NODE_RANK"] = str(env.node_rank())
        os.environ["LOCAL_RANK"] = str(env.local_rank())
        os.environ["WORLD_SIZE"] = f"{self.num_processes * self.num_nodes}"
        for local_rank in range(1, self.num_processes):
            env_copy = os.environ.copy()
            env_copy["LOCAL_RANK"] = f"{local_rank}"
            if os.environ.get("PL_GLOBAL_SEED") is None:
                env_copy.pop("PL_GLOBAL_SEED", None)
            if _hydra_running():
                command, cwd = job_rank_command(local_rank)
            else:
                command, cwd = list(_basic_subprocess_cmd()), None
            self.procs.append(subprocess.Popen(command, env=env_copy, cwd=cwd))


def _hydra_running() -> bool:
    try:
        from hydra.core.hydra_config import HydraConfig
    except ImportError:  # pragma: no cover - hydra is a dependency
        return False
    return HydraConfig.initialized()


def _job_output_dir() -> str | None:
    if not _hydra_running():
        return None
    from hydra.core.hydra_config import HydraConfig

    return str(HydraConfig.get().runtime.output_dir)


class JobDDPStrategy(DDPStrategy):
    """``DDPStrategy`` whose ranks are relaunched as the running Hydra job (module docstring).

    Takes DDPStrategy's arguments; ``start_method`` other than ``popen`` (spawn, fork) uses
    Lightning's own launcher, which needs no relaunch.
    """

    def _configure_launcher(self) -> None:
        if self._start_method == "popen":
            assert self.cluster_environment is not None
            self._launcher = _JobLauncher(
                self.cluster_environment, self.num_processes, self.num_nodes
            )
        else:
            super()._configure_launcher()


def with_job_ddp(trainer_kwargs: dict) -> dict:
    """Trainer keyword arguments with ``strategy="ddp"`` replaced by :class:`JobDDPStrategy`.

    Other strategies (``auto``, ``ddp_spawn``, a Strategy object) are left as they are.
    """
    strategy = trainer_kwargs.get("strategy")
    if isinstance(strategy, str) and strategy == "ddp":
        return {**trainer_kwargs, "strategy": JobDDPStrategy()}
    return trainer_kwargs
