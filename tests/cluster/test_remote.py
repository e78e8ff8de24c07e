"""Remote mode: the job script (pure). The SSH session and remote campaigns are tested against
real services in test_cluster.py."""

from __future__ import annotations

from ionwell.cluster.remote import job_script
from ionwell.config.campaign import RemoteConfig, parse_campaign


def _campaign(**compute):
    return parse_campaign(
        {
            "name": "r",
            "host": {"builder": {"shells": 1, "layers": 1}},
            "resources": {"compute": {"walltime": 30, "walltime_factor": 2, **compute}},
        }
    )


def _remote(**kw) -> RemoteConfig:
    base = {
        "host": "h",
        "user": "u",
        "key_file": "k",
        "known_hosts": "kh",
        "workdir": "/w",
        "setup": ["module load x"],
    }
    return RemoteConfig(**{**base, **kw})


def test_job_script_for_slurm_and_pbs():
    c = _campaign(tasks=2, threads=4, memory=3000, partition="p1", account="a1", extra="--qos=q")
    s = job_script(c, "/w/r dir/steps/0001/engine", "iw-r-0001", 2, _remote())
    # the second attempt gets walltime × factor (30 × 2 min)
    for line in (
        "#SBATCH --time=60",
        "#SBATCH --ntasks=2",
        "#SBATCH --cpus-per-task=4",
        "#SBATCH --mem=3000M",
        "#SBATCH --partition=p1",
        "#SBATCH --account=a1",
        "#SBATCH --qos=q",
        "cd '/w/r dir/steps/0001/engine' || exit 1",
        "module load x",
    ):
        assert line in s.splitlines(), line
    assert s.splitlines()[-1].startswith("echo $? > ionwell.exit.tmp")
    p = job_script(c, "/w/x", "iw-r-0001", 1, _remote(scheduler="pbs"))
    for line in ("#PBS -N iw-r-0001", "#PBS -l walltime=00:30:00", "#PBS -q p1", "#PBS -A a1"):
        assert line in p.splitlines(), line


def test_inputs_digest_follows_the_staged_inputs(tmp_path):
    """A job record is re-attached only for the same inputs: another site (a rejected one
    replaced) or another engine setting (an SCF retry) gives another digest."""
    from ase import Atoms
    from ase.io import write

    from ionwell.cluster.remote import inputs_digest
    from ionwell.engines.base import ComputeContext

    c = _campaign()
    write(tmp_path / "input.extxyz", Atoms("Li", positions=[[0, 0, 1.5]]))
    (tmp_path / "context.json").write_text(ComputeContext(step=1, charge=1).model_dump_json())
    first = inputs_digest(c, tmp_path)
    assert inputs_digest(c, tmp_path) == first
    write(tmp_path / "input.extxyz", Atoms("Li", positions=[[0, 0, -1.5]]))
    moved = inputs_digest(c, tmp_path)
    assert moved != first
    retry = c.model_copy(update={"engine": c.engine.model_copy(update={"max_cycle": 300})})
    assert inputs_digest(retry, tmp_path) != moved
