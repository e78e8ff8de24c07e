"""The ``command`` engine and the launcher, driving a real DFT program through files.

The external program is ``tests/programs/pyscf_runner.py``: PySCF behind a text interface (a
plain input, a text log, a restartable checkpoint, a Gaussian cube of the potential in atomic
units written by ``pyscf.tools.cubegen.mep``). It stands in for a compiled code on a cluster.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
import yaml
from ase import Atoms
from ase.build import molecule
from ase.io import write
from ase.units import Hartree
from shared import COMMAND, TEMPLATE

from ionwell.config.campaign import LauncherConfig, parse_campaign
from ionwell.engines import get_engine
from ionwell.engines.base import ComputeContext
from ionwell.engines.launcher import EngineRunError, command_line, run_program
from ionwell.errors import ConfigError, EngineOutputError


# the runner engine's definition is shared with the cluster tests
def _campaign(tmp: Path, engine: dict | None = None, **extra):
    (tmp / "runner.tmpl").write_text(TEMPLATE)
    data = {
        "name": "cmd",
        "host": {"builder": {"layers": 1, "shells": 1}},
        "engine": engine or COMMAND,
        "relax": {"enabled": False},
        **extra,
    }
    cfg = tmp / "cmd.yaml"
    cfg.write_text(yaml.safe_dump(data))
    from ionwell.config.campaign import load_campaign

    return load_campaign(cfg)


# ---------------------------------------------------------------------------------------------
# launcher (fast)


def test_launcher_prefixes_and_modules_keep_arguments_apart():
    argv = ["prog", "-in", "${input}", "a b; rm -rf /"]
    vals = {"input": "job.inp"}
    assert command_line(argv, LauncherConfig(), vals) == ["prog", "-in", "job.inp", "a b; rm -rf /"]
    mpi = command_line(argv, LauncherConfig(kind="mpi", tasks=4), vals)
    assert mpi[:3] == ["mpirun", "-np", "4"] and mpi[3:] == [
        "prog",
        "-in",
        "job.inp",
        "a b; rm -rf /",
    ]
    srun = command_line(argv, LauncherConfig(kind="srun", tasks=2, threads=8), vals)
    assert srun[:3] == ["srun", "--ntasks=2", "--cpus-per-task=8"]
    mod = command_line(argv, LauncherConfig(modules=["qe/7.2", "intel"]), vals)
    # module names and program arguments are positional parameters of the snippet, never
    # spliced into it
    assert mod[:2] == ["bash", "-lc"] and "rm -rf" not in mod[2]
    assert mod[4:] == ["2", "qe/7.2", "intel", "prog", "-in", "job.inp", "a b; rm -rf /"]
    with pytest.raises(ConfigError, match=r"unknown placeholder \$\{nope\}"):
        command_line(["x", "${nope}"], LauncherConfig(), vals)


def test_modules_snippet_runs_the_program_with_its_arguments(tmp_path):
    # a fake 'module' shell function stands in for environment modules (not installed here)
    full = command_line(
        [sys.executable, "-c", "import sys; print(sys.argv[1:])", "x y", "$$HOME"],  # $$: literal
        LauncherConfig(modules=["m1"]),
        {},
    )
    full[2] = 'module() { echo loaded "$@"; }; ' + full[2]
    out = subprocess.run(full, capture_output=True, text=True, check=True).stdout
    assert "loaded load m1" in out and "['x y', '$HOME']" in out


def test_run_program_env_scratch_and_errors(tmp_path):
    work = tmp_path / "engine"
    work.mkdir()
    (work / "in.txt").write_text("hello")
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    code = (
        "import os, pathlib; p = pathlib.Path('out.txt'); "
        "p.write_text(pathlib.Path('in.txt').read_text() + os.environ['IW_TEST'] + os.getcwd())"
    )
    cfg = LauncherConfig(env={"IW_TEST": "-env"}, scratch=str(scratch))
    run_program([sys.executable, "-c", code], work, cfg, stdout="log.txt", step=4)
    text = (work / "out.txt").read_text()
    assert text.startswith("hello-env") and str(scratch) in text  # ran in scratch, copied back
    assert list(scratch.iterdir()) == []  # scratch folder removed

    with pytest.raises(EngineRunError, match=r"step 4: cannot start 'no-such-program-x'"):
        run_program(["no-such-program-x"], work, LauncherConfig(), stdout=None, step=4)
    fail = [sys.executable, "-c", "print('bad input line 7'); raise SystemExit(3)"]
    with pytest.raises(EngineRunError, match=r"(?s)exited with code 3.*bad input line 7"):
        run_program(fail, work, LauncherConfig(), stdout="log.txt", step=4)
    slow = [sys.executable, "-c", "import time; time.sleep(30)"]
    with pytest.raises(EngineRunError, match="timeout"):
        run_program(slow, work, LauncherConfig(), stdout=None, timeout=1.0)


def test_configured_threads_win_over_an_inherited_omp_num_threads(tmp_path, monkeypatch):
    """``launcher.threads`` reaches the program as OMP_NUM_THREADS even when the shell exported
    another value (cluster login scripts often export 1); ``launcher.env`` sets it outright."""
    work = tmp_path / "engine"
    work.mkdir()
    code = "import os, pathlib; pathlib.Path('omp.txt').write_text(os.environ['OMP_NUM_THREADS'])"
    monkeypatch.setenv("OMP_NUM_THREADS", "1")
    run_program([sys.executable, "-c", code], work, LauncherConfig(threads=3), stdout=None)
    assert (work / "omp.txt").read_text() == "3"
    cfg = LauncherConfig(threads=3, env={"OMP_NUM_THREADS": "5"})
    run_program([sys.executable, "-c", code], work, cfg, stdout=None)
    assert (work / "omp.txt").read_text() == "5"


# ---------------------------------------------------------------------------------------------
# the engine on one real run (fast: water, STO-3G)


@pytest.fixture(scope="module")
def water_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("water")
    campaign = _campaign(tmp)
    engine = get_engine(campaign)
    work = tmp / "engine"
    atoms = molecule("H2O")
    engine.prepare(atoms, work, ComputeContext(step=2, charge=0))
    engine.launch(work, campaign.launcher)
    return campaign, engine, work, atoms


def test_template_input_and_state(water_run):
    campaign, engine, work, atoms = water_run
    text = (work / "job.inp").read_text()
    assert "step 2" in text and "charge 0" in text and "spin 0" in text and "restart no" in text
    assert text.count("\n") == TEMPLATE.count("\n") + len(atoms) - 1
    # the template's text is part of the validated (and so the frozen) config
    assert campaign.engine.input.template_text == TEMPLATE
    state = json.loads((work / "command.json").read_text())
    assert state["restart"] is None and state["seconds"] > 0


def test_collect_matches_pyscf_directly(water_run):
    """Energy, charges and potential agree with PySCF called directly (reference library)."""
    from pyscf import dft, gto

    _, engine, work, atoms = water_run
    result, grid = engine.collect(work)
    mol = gto.M(atom=[(a.symbol, tuple(a.position)) for a in atoms], basis="sto-3g", verbose=0)
    mf = dft.RKS(mol)
    mf.xc, mf.grids.level, mf.conv_tol = "lda,vwn", 1, 1e-9
    e = mf.kernel() * Hartree
    assert abs(result.energy - e) < 1e-5
    assert result.scf_converged and result.notes == []
    assert result.charge_scheme == "mulliken" and abs(sum(result.charges)) < 1e-6
    assert result.code == "pyscf-runner" and result.homo < 0
    # the map is in volts, potential convention: far from a neutral molecule it is small, at
    # the oxygen nucleus it is a large positive maximum
    assert grid.values.max() > 100 and abs(np.median(grid.values)) < 1.0


@pytest.mark.parametrize(
    ("damage", "expected"),
    [
        ("missing-potential", r"step 2: .*potential\.cube: missing \(expected the potential map\)"),
        ("truncated-cube", r"step 2: .*potential\.cube"),
        ("nan-energy", r"step 2: .*job\.log: the total energy is nan"),
        ("no-energy", r"step 2: .*job\.log: no line matching .*expected the total energy"),
        ("empty-log", r"step 2: .*job\.log: empty"),
        ("nan-cube", r"step 2: .*potential\.cube"),
        (
            "few-charges",
            r"step 2: .*job\.log: 2 lines match the mulliken charge pattern, expected at least 3",
        ),
    ],
)
def test_malformed_outputs_give_one_clear_error(water_run, tmp_path, damage, expected):
    _, engine, work, _ = water_run
    copy = tmp_path / "engine"
    shutil.copytree(work, copy)
    log, cube = copy / "job.log", copy / "potential.cube"
    text = log.read_text()
    if damage == "missing-potential":
        cube.unlink()
    elif damage == "truncated-cube":
        lines = cube.read_text().splitlines()
        cube.write_text("\n".join(lines[: len(lines) // 2]) + "\n")
    elif damage == "nan-energy":
        log.write_text(re.sub(r"total energy \S+ hartree", "total energy NaN hartree", text))
    elif damage == "no-energy":
        log.write_text("\n".join(x for x in text.splitlines() if "total energy" not in x))
    elif damage == "empty-log":
        log.write_text("")
    elif damage == "nan-cube":
        lines = cube.read_text().splitlines()
        lines[-1] = " ".join(["NaN"] * len(lines[-1].split()))
        cube.write_text("\n".join(lines) + "\n")
    elif damage == "few-charges":
        log.write_text("\n".join(x for x in text.splitlines() if " O " not in x))
    with pytest.raises(EngineOutputError, match=expected) as info:
        engine.collect(copy)
    assert "Traceback" not in str(info.value)


def test_missing_convergence_line_is_a_finding_not_a_crash(water_run, tmp_path):
    _, engine, work, _ = water_run
    copy = tmp_path / "engine"
    shutil.copytree(work, copy)
    log = copy / "job.log"
    log.write_text(log.read_text().replace("SCF converged", "SCF stopped"))
    result, _ = engine.collect(copy)
    assert result.scf_converged is False
    assert result.notes == [
        "job.log: no line matching '^SCF converged' (SCF convergence not proven)"
    ]


def test_bad_engine_configs_are_named(tmp_path):
    bad = {
        **COMMAND,
        "outputs": {**COMMAND["outputs"], "energy": {"file": "x", "regex": "no group"}},
    }
    with pytest.raises(ConfigError, match=r"engine\.outputs\.energy\.regex.*capturing group"):
        _campaign(tmp_path, bad)
    bad = {**COMMAND, "input": {"file": "job.inp", "template": "missing.tmpl"}}
    with pytest.raises(ConfigError, match=r"engine\.input\.template: cannot read .*missing\.tmpl"):
        _campaign(tmp_path, bad)
    with pytest.raises(ConfigError, match=r"no definition named 'nope'"):
        _campaign(tmp_path, {"kind": "command", "definition": "nope"})


# ---------------------------------------------------------------------------------------------
# campaigns through the command engine (slow)


# a benzene ring with its atoms moved by up to 0.04 Å (seeded): no symmetry is left, so no two
# wells tie and both engines must find the same order of wells on their own grids
def _host_file(tmp: Path) -> Path:
    ring = molecule("C6H6")
    rng = np.random.default_rng(11)
    ring.positions += rng.uniform(-0.04, 0.04, ring.positions.shape)
    f = tmp / "ring.extxyz"
    write(f, Atoms(ring.get_chemical_symbols(), positions=ring.positions))
    return f


def _run(tmp: Path, name: str, engine: dict, env: dict | None = None, timeout=900):
    (tmp / "runner.tmpl").write_text(TEMPLATE)
    data = {
        "name": name,
        "host": {"file": str(_host_file(tmp))},
        "guest": {"element": "Li", "charge_mode": "cation"},
        "engine": engine,
        "placement": {"within": 3.0},
        "relax": {"enabled": False},
        "stop": {"guests": 1},  # the host, then one Li⁺
    }
    if env:
        data["launcher"] = {"env": env}
    cfg = tmp / f"{name}.yaml"
    cfg.write_text(yaml.safe_dump(data))
    proc = subprocess.Popen(
        [sys.executable, "-m", "ionwell.cli", "run", str(cfg), "--root", str(tmp)],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
    )
    return proc


@pytest.mark.slow
def test_command_engine_campaign_matches_the_embedded_engine(tmp_path):
    from ionwell.store.campaign import CampaignPaths
    from ionwell.store.ledger import read_ledger

    embedded = {
        "xc": "lda,vwn",
        "basis": "sto-3g",
        "grid_level": 1,
        "density_fit": False,
        "conv_tol": 1e-9,
        "potential_grid": {"spacing": 0.3, "margin": 3.0},
    }
    runs = {}
    for name, engine in (("via-command", COMMAND), ("in-process", embedded)):
        proc = _run(tmp_path, name, engine)
        out, err = proc.communicate(timeout=900)
        assert proc.returncode == 0, err[-3000:]
        runs[name] = read_ledger(CampaignPaths(tmp_path / "campaigns" / name).ledger)
    a, b = runs["via-command"], runs["in-process"]
    assert [r.guests for r in a] == [r.guests for r in b] == [0, 1]
    pa, pb = a[0].decision.chosen[0].position, b[0].decision.chosen[0].position
    assert np.linalg.norm(np.subtract(pa, pb)) < 0.05, (pa, pb)
    # same physics, same numbers: energies from the two routes agree (PySCF both ways)
    np.testing.assert_allclose([r.energy for r in a], [r.energy for r in b], atol=1e-4)
    assert a[0].engine == "pyscf-runner" and b[0].engine == "pyscf"


def _runner_pids(workdir: Path) -> list[int]:
    pids = []
    for p in Path("/proc").iterdir():
        if not p.name.isdigit():
            continue
        try:
            cmd = (p / "cmdline").read_bytes().split(b"\0")
            cwd = os.readlink(p / "cwd")
        except OSError:
            continue
        if any(c.endswith(b"pyscf_runner.py") for c in cmd) and Path(cwd) == workdir:
            pids.append(int(p.name))
    return pids


@pytest.mark.slow
def test_killed_program_is_retried_and_restarts_from_its_checkpoint(tmp_path):
    from ionwell.store.campaign import CampaignPaths
    from ionwell.store.ledger import read_ledger

    work = tmp_path / "campaigns" / "killed" / "steps" / "0001" / "engine"
    killed: list[int] = []

    def kill_mid_scf() -> None:
        deadline = time.monotonic() + 600
        while time.monotonic() < deadline and not killed:
            log = work / "job.log"
            if (
                (work / "runner.chk").is_file()
                and log.is_file()
                and "iteration 3" in log.read_text()
            ):
                for pid in _runner_pids(work.resolve()):
                    os.kill(pid, signal.SIGKILL)
                    killed.append(pid)
            time.sleep(0.05)

    watcher = threading.Thread(target=kill_mid_scf, daemon=True)
    watcher.start()
    # the delay after each SCF iteration (an environment variable set through the launcher)
    # leaves time to kill the program mid-run
    proc = _run(tmp_path, "killed", COMMAND, env={"RUNNER_DELAY": "0.3"})
    out, err = proc.communicate(timeout=900)
    watcher.join(timeout=1)
    assert killed, "the program was never seen running"
    assert proc.returncode == 0, err[-3000:]
    recs = read_ledger(CampaignPaths(tmp_path / "campaigns" / "killed").ledger)
    assert [r.guests for r in recs] == [0, 1] and all(r.scf_converged for r in recs)
    # the retried attempt found the killed attempt's checkpoint and the program used it
    assert "restart: initial guess from runner.chk" in (work / "job.log").read_text()
    assert json.loads((work / "command.json").read_text())["restart"] == "earlier attempt"
    events = [
        json.loads(x)
        for x in (tmp_path / "campaigns" / "killed" / "events.jsonl").read_text().splitlines()
    ]
    failed = [e for e in events if e["event"] == "failed" and e["step"] == 1]
    assert failed and "killed by signal 9" in failed[0]["message"]


# ---------------------------------------------------------------------------------------------
# engine definitions and `ionwell engines`


def _user_definition(folder: Path) -> Path:
    """The runner as a user's own definition file (no Python), in <config dir>/engines/."""
    d = folder / "engines"
    d.mkdir(parents=True, exist_ok=True)
    (d / "runner.tmpl").write_text(TEMPLATE)
    (d / "my-runner.yaml").write_text(yaml.safe_dump({**COMMAND, "label": "my-runner"}))
    return d


def test_engines_lists_kinds_and_definitions_and_checks_one(tmp_path):
    _user_definition(tmp_path)
    ionwell = [sys.executable, "-m", "ionwell.cli", "engines"]
    out = subprocess.run([*ionwell, "--config-dir", str(tmp_path)], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    for word in ("pyscf", "tblite", "ase", "command", "my-runner", "quantum-espresso", "cp2k"):
        assert word in out.stdout
    chk = subprocess.run(
        [*ionwell, "check", "my-runner", "--config-dir", str(tmp_path), "--json"],
        capture_output=True,
        text=True,
    )
    assert chk.returncode == 0, chk.stdout + chk.stderr
    report = json.loads(chk.stdout)
    assert report["ok"] and report["kind"] == "command" and report["scf_converged"]
    # H2 at 0.74 Å, LDA/STO-3G: about -1.03 hartree = -28.1 eV (PySCF; checked against the
    # embedded engine on the same probe below)
    emb = subprocess.run([*ionwell, "check", "pyscf", "--json"], capture_output=True, text=True)
    assert emb.returncode == 0, emb.stdout + emb.stderr
    assert abs(json.loads(emb.stdout)["energy"] - report["energy"]) < 0.1
    assert report["charge_scheme"] == "mulliken" and len(report["charges"]) == 2
    # a definition whose program is absent is reported, not crashed on
    qe = subprocess.run([*ionwell, "check", "quantum-espresso"], capture_output=True, text=True)
    if shutil.which("pw.x") is None:
        assert qe.returncode == 3 and "not installed here" in qe.stdout


def test_shipped_definitions_write_their_inputs(tmp_path):
    from ionwell.config.definitions import resolve_engines

    atoms = molecule("C6H6")
    atoms.cell = [16.0, 16.0, 12.0]
    atoms.center()
    for name, infile, expect in (
        ("quantum-espresso", "pw.in", ["tot_charge", "restart_mode", "from_scratch", "C.pbe"]),
        # C6H6⁺ has 41 electrons: a doublet, unrestricted
        (
            "cp2k",
            "cp2k.inp",
            ["CHARGE 1", "SCF_GUESS ATOMIC", "MULTIPLICITY 2", "UKS true", "      A "],
        ),
    ):
        data = {
            "name": "d",
            "host": {"builder": {"shells": 1, "layers": 1}},
            "engine": {"definition": name},
        }
        campaign = parse_campaign(resolve_engines(data, tmp_path), name)
        engine = get_engine(campaign)
        work = tmp_path / name
        engine.prepare(atoms, work, ComputeContext(step=0, charge=1))
        text = (work / infile).read_text()
        for word in expect:
            assert word in text, (name, word)
        assert "${" not in text
    # the QE input says the charge as a number and reads back with ASE's own reader
    from ase.io.espresso import read_fortran_namelist

    with open(tmp_path / "quantum-espresso" / "pw.in") as f:
        namelist, _ = read_fortran_namelist(f)
    assert namelist["system"]["tot_charge"] == 1


# ---------------------------------------------------------------------------------------------
# the cell rule, version capture, the warm-start rule, frozen definitions (fast)


def _template_engine(tmp: Path, template: str, **over):
    """A command engine whose input is ``template`` (nothing is run)."""
    (tmp / "box.tmpl").write_text(template)
    engine = {**COMMAND, "input": {"file": "job.inp", "template": "box.tmpl"}, **over}
    return get_engine(_campaign(tmp, engine))


def test_cell_rule_boxes_a_structure_without_a_periodic_cell(tmp_path):
    from ionwell.config.engines import CellSpec
    from ionwell.engines.command_engine import needs_box, program_frame

    spec = CellSpec(box={"vacuum": 5.0})
    ring = molecule("C6H6")  # no cell, not periodic
    ring.positions += [3.0, -1.0, 2.0]
    a, shift, boxed = program_frame(ring, spec)
    extent = np.ptp(ring.positions, axis=0)
    assert boxed and needs_box(ring)
    np.testing.assert_allclose(a.cell.lengths(), extent + 10.0)
    np.testing.assert_allclose(np.asarray(a.cell), np.diag(extent + 10.0))  # orthorhombic
    # atoms centred: 5 Å of vacuum on each side along every axis
    np.testing.assert_allclose(a.positions.min(axis=0), 5.0)
    np.testing.assert_allclose(a.cell.lengths() - a.positions.max(axis=0), 5.0)
    np.testing.assert_allclose(a.positions - shift, ring.positions)
    assert not a.pbc.any()  # pbc flags as the structure has them

    # a non-periodic structure with a cell (the H2 probe) gets the box too
    probe = Atoms("H2", positions=[[4, 4, 4], [4, 4, 4.74]], cell=[8, 8, 8])
    a, _, boxed = program_frame(probe, spec)
    assert boxed and np.allclose(a.cell.lengths(), [10.0, 10.0, 10.74])
    # periodic along x with no full cell: boxed; flags kept
    half = Atoms(
        "C2", positions=[[0, 0, 0], [1.4, 0, 0]], cell=[2.8, 0, 0], pbc=[True, False, False]
    )
    a, _, boxed = program_frame(half, spec)
    assert boxed and a.pbc.tolist() == [True, False, False] and a.cell.rank == 3
    # a periodic structure with a full cell keeps it, unshifted
    graphite = Atoms(
        "C2",
        positions=[[0, 0, 0], [1.23, 0.71, 0]],
        cell=[[2.46, 0, 0], [-1.23, 2.13, 0], [0, 0, 8]],
    )
    graphite.pbc = [True, True, False]
    a, shift, boxed = program_frame(graphite, spec)
    assert not boxed and not shift.any()
    np.testing.assert_allclose(np.asarray(a.cell), np.asarray(graphite.cell))


def test_box_placeholder_and_input_agree_on_every_step(tmp_path):
    engine = _template_engine(
        tmp_path,
        "box ${box}\nboxed ${boxed}\nperiodic ${periodic}\ncell\n${cell}\n${structure}\n"
        "${cell_a}\n${cell_b}\n${cell_c}\n",
        cell={
            "box": {"vacuum": 6.0},
            "placeholders": {"periodic": {"box": "NONE", "periodic": "XY"}},
        },
    )
    ring = molecule("C6H6")
    work = tmp_path / "step0"
    engine.prepare(ring, work, ComputeContext(step=0))
    lines = (work / "job.inp").read_text().splitlines()
    box = np.array(lines[0].split()[1:], dtype=float)
    np.testing.assert_allclose(box, np.ptp(ring.positions, axis=0) + 12.0, atol=1e-5)
    assert lines[1] == "boxed true" and lines[2] == "periodic NONE"
    cell = np.array([x.split() for x in lines[4:7]], dtype=float)
    np.testing.assert_allclose(np.diag(cell), box, atol=1e-5)
    pos = np.array([x.split()[1:] for x in lines[7:-3]], dtype=float)
    np.testing.assert_allclose(np.array([x.split() for x in lines[-3:]], float), cell)
    assert (pos.min(axis=0) > 5.99).all() and (box - pos.max(axis=0) > 5.99).all()
    state = json.loads((work / "command.json").read_text())
    assert state["frame"]["boxed"] and np.allclose(pos - state["frame"]["shift"], ring.positions)
    # the launcher's placeholders (argv) come from the same rule
    assert engine.placeholder_values(work)["box"] == lines[0].split(None, 1)[1]
    # the input recorded for the step keeps the structure as it came in (no cell invented)
    from ase.io import read

    kept = read(work / "input.extxyz")
    np.testing.assert_allclose(kept.positions, ring.positions)
    # a periodic structure: its own cell, the 'periodic' value
    graphite = Atoms("C2", positions=[[0, 0, 0], [1.23, 0.71, 0]], pbc=[True, True, True])
    graphite.cell = [[2.46, 0, 0], [-1.23, 2.13, 0], [0, 0, 6.7]]
    engine.prepare(graphite, tmp_path / "per", ComputeContext(step=0))
    text = (tmp_path / "per" / "job.inp").read_text().splitlines()
    assert text[1] == "boxed false" and text[2] == "periodic XY"
    np.testing.assert_allclose(np.array(text[0].split()[1:], float), graphite.cell.lengths(), 1e-5)
    # the skewed cell vector by vector (${cell_a} ...), as ASE holds it
    vectors = np.array([x.split() for x in text[-3:]], dtype=float)
    np.testing.assert_allclose(vectors, np.asarray(graphite.cell), atol=1e-6)


def test_placeholder_names_may_not_shadow_builtins(tmp_path):
    bad = {**COMMAND, "cell": {"placeholders": {"box": {"box": 1, "periodic": 2}}}}
    with pytest.raises(ConfigError, match="built-in placeholder"):
        _campaign(tmp_path, bad)


def test_map_and_result_are_in_the_frame_of_the_structure_that_came_in(water_run, tmp_path):
    """The runner computed water in the box's frame; the map comes back in the caller's: its
    maximum (potential convention: the nuclear Coulomb singularities) lies at a nucleus of the
    structure that was passed in, not one shifted by the box, and the structure handed on has
    no invented cell."""
    _, engine, work, atoms = water_run
    state = json.loads((work / "command.json").read_text())
    assert state["frame"]["boxed"] and np.linalg.norm(state["frame"]["shift"]) > 1.0
    result, grid = engine.collect(work)
    top = grid.points(np.array(np.unravel_index(np.argmax(grid.values), grid.shape)))
    nearest = np.linalg.norm(atoms.positions - top, axis=1).min()
    assert nearest < 0.3  # at a nucleus, within one grid spacing (0.3 Å)
    np.testing.assert_allclose(result.positions, atoms.positions)
    assert result.cell is None and result.pbc == [False, False, False]
    # the structure handed on is boxed again at the next step (every step, not only step 0)
    nxt = tmp_path / "next"
    engine.prepare(result.atoms(), nxt, ComputeContext(step=3))
    assert json.loads((nxt / "command.json").read_text())["frame"]["boxed"]


def test_version_is_what_the_program_printed(water_run, tmp_path):
    campaign, _, work, _ = water_run
    copy = tmp_path / "engine"
    shutil.copytree(work, copy)
    spec = {"file": "job.log", "regex": r"^pyscf-runner \(PySCF ([^)]*)\)"}
    engine = get_engine(
        _campaign(tmp_path, {**COMMAND, "outputs": {**COMMAND["outputs"], "version": spec}})
    )
    log = copy / "job.log"
    text = log.read_text()
    # the runner prints its version line with PySCF's version, when PySCF exposes one there
    log.write_text(text.replace("pyscf-runner (PySCF", "pyscf-runner (PySCF 2.6.2", 1))
    result, _ = engine.collect(copy)
    assert result.code_version == "2.6.2" and result.notes == []
    # the last match counts
    log.write_text(log.read_text() + "pyscf-runner (PySCF 9.9.9)\n")
    assert engine.collect(copy)[0].code_version == "9.9.9"
    # a version line naming no version, or no such line: the static version, and a note
    log.write_text(text.replace("pyscf-runner (PySCF 2.6.2", "pyscf-runner (PySCF "))
    result, _ = engine.collect(copy)
    assert result.code_version == "test" and "names no version" in result.notes[0]
    log.write_text(text.replace("pyscf-runner (PySCF", "runner ("))
    result, _ = engine.collect(copy)
    assert result.code_version == "test"
    assert any("no line matching" in n and "version 'test'" in n for n in result.notes)
    with pytest.raises(ConfigError, match="capturing group"):
        _campaign(tmp_path, {**COMMAND, "outputs": {**COMMAND["outputs"], "version": {
            "file": "job.log", "regex": "PySCF"}}})  # fmt: skip


def test_charge_schemes_scf_count_and_a_restart_the_program_ignored(water_run, tmp_path):
    """outputs.charges as a list: every scheme goes into charge_sets (the first is the main
    one), each checked against PySCF's own analysis; outputs.scf_iterations is the program's
    last iteration line; restart.not_used turns files in place into a cold start when the
    program says it started from its own guess."""
    from pyscf import dft, gto

    _, _, work, atoms = water_run
    copy = tmp_path / "engine"
    shutil.copytree(work, copy)
    outputs = {
        **COMMAND["outputs"],
        "charges": [
            {"file": "job.log", "regex": r"^atom\s+\d+\s+\S+\s+meta-lowdin\s+(\S+)",
             "scheme": "meta-lowdin"},
            COMMAND["outputs"]["charges"],
        ],
        "scf_iterations": {"file": "job.log", "regex": r"^iteration (\d+) energy"},
    }  # fmt: skip
    restart = {**COMMAND["restart"], "not_used": {"file": "job.log", "regex": "^initial guess:"}}
    engine = get_engine(_campaign(tmp_path, {**COMMAND, "outputs": outputs, "restart": restart}))
    result, _ = engine.collect(copy)
    # reference: PySCF directly, the runner's settings (LDA/STO-3G, grid level 1)
    mol = gto.M(atom=[(a.symbol, tuple(a.position)) for a in atoms], basis="sto-3g", verbose=0)
    mf = dft.RKS(mol)
    mf.xc, mf.grids.level, mf.conv_tol = "lda,vwn", 1, 1e-9
    mf.kernel()
    assert result.charge_scheme == "meta-lowdin" and set(result.charge_sets) == {
        "meta-lowdin", "mulliken"}  # fmt: skip
    np.testing.assert_allclose(result.charges, mf.mulliken_meta(verbose=0)[1], atol=1e-5)
    np.testing.assert_allclose(result.charge_sets["mulliken"], mf.mulliken_pop(verbose=0)[1],
                               atol=1e-5)  # fmt: skip
    lines = re.findall(r"^iteration (\d+)", (copy / "job.log").read_text(), flags=re.MULTILINE)
    assert result.scf_iterations == int(lines[-1]) == len(lines) > 1
    assert not result.warm_started  # no restart files in place: nothing to judge

    # restart files in place, but the program says it started from atoms
    state = json.loads((copy / "command.json").read_text())
    state["restart"] = "previous step"
    (copy / "command.json").write_text(json.dumps(state))
    result, _ = engine.collect(copy)
    assert not result.warm_started
    assert any("did not use the restart files" in n for n in result.notes)
    # ... and when it does not say so, the files in place count
    log = copy / "job.log"
    log.write_text(log.read_text().replace("initial guess: superposition", "guess: superposition"))
    assert engine.collect(copy)[0].warm_started
    # a list of charge schemes names each scheme once
    twice = {**outputs, "charges": [COMMAND["outputs"]["charges"]] * 2}
    with pytest.raises(ConfigError, match="each charge scheme once"):
        _campaign(tmp_path, {**COMMAND, "outputs": twice})


def test_warm_start_only_from_a_step_with_the_same_atoms(tmp_path):
    """runner.chk of the previous step is copied and used (the runner says so in its log) when
    the atom count is the same; with one more atom nothing is copied, ${restart} is 'no', the
    result records a cold start and a note says why."""
    used = {"file": "job.log", "regex": "restart: initial guess from runner.chk"}
    engine = get_engine(
        _campaign(tmp_path, {**COMMAND, "restart": {**COMMAND["restart"], "used": used}})
    )
    launcher = LauncherConfig()
    water = molecule("H2O")
    first = tmp_path / "s0"
    engine.prepare(water, first, ComputeContext(step=0))
    engine.launch(first, launcher)
    assert (first / "runner.chk").is_file()
    assert engine.collect(first)[0].guess == "cold: the program's own initial guess"

    same = water.copy()
    same.positions[1] += [0.0, 0.02, 0.0]
    second = tmp_path / "s1"
    engine.prepare(same, second, ComputeContext(step=1, previous=first))
    assert (second / "runner.chk").is_file() and "restart yes" in (second / "job.inp").read_text()
    engine.launch(second, launcher)
    result, _ = engine.collect(second)
    assert result.warm_started and result.notes == []
    assert result.guess == "restart files of the previous step"

    more = water + Atoms("H", positions=[[0.0, 0.0, 2.5]])
    third = tmp_path / "s2"
    engine.prepare(more, third, ComputeContext(step=2, charge=1, previous=second))
    assert not (third / "runner.chk").exists()
    assert "restart no" in (third / "job.inp").read_text()
    engine.launch(third, launcher)
    result, _ = engine.collect(third)
    assert not result.warm_started
    assert any("cold start" in n and "had 3 atoms, this one 4" in n for n in result.notes)
    assert result.guess == "cold: the previous step had 3 atoms, this one 4"
    assert "initial guess from runner.chk" not in (third / "job.log").read_text()

    # files in place but the program did not say it read them: not counted as a warm start
    fourth = tmp_path / "s3"
    engine.prepare(more, fourth, ComputeContext(step=3, charge=1, previous=third))
    (fourth / "runner.chk").write_bytes(b"not a checkpoint")
    shutil.copy(third / "job.log", fourth / "job.log")
    shutil.copy(third / "potential.cube", fourth / "potential.cube")
    state = json.loads((fourth / "command.json").read_text())
    state["restart"] = "previous step"
    (fourth / "command.json").write_text(json.dumps(state))
    result, _ = engine.collect(fourth)
    assert not result.warm_started
    assert any("use of the restart files not proven" in n for n in result.notes)
    assert result.guess == "cold: the program did not use the restart files in place"


def test_frozen_campaign_loads_without_its_definition(tmp_path, monkeypatch):
    """A definition kept in engines/ beside the config; the campaign is frozen under another
    root; loaded from the campaign folder (where engines/ is not), it is the same campaign."""
    from ionwell.config.campaign import load_campaign
    from ionwell.store.campaign import CampaignPaths, check_frozen, freeze_or_check, load_frozen

    cfg_dir = tmp_path / "configs"
    _user_definition(cfg_dir)
    data = {
        "name": "frozen-def",
        "host": {"builder": {"layers": 1, "shells": 1}},
        "engine": {"definition": "my-runner", "timeout": 600},
        "relax": {"enabled": False},
    }
    cfg = cfg_dir / "c.yaml"
    cfg.write_text(yaml.safe_dump(data))
    campaign = load_campaign(cfg)
    assert campaign.engine.definition == "my-runner" and campaign.engine.definition_merged
    paths = CampaignPaths(tmp_path / "elsewhere" / "campaigns" / "frozen-def")
    paths.root.mkdir(parents=True)
    assert freeze_or_check(paths, campaign)
    frozen_text = paths.config.read_text()
    assert "definition_merged: true" in frozen_text and "template_text" in frozen_text

    shutil.rmtree(cfg_dir / "engines")  # the definition is gone
    monkeypatch.delenv("IONWELL_ENGINES", raising=False)
    monkeypatch.chdir(paths.root)
    again = load_frozen(paths)
    assert again == campaign and again.engine.label == "my-runner"
    # the original config, its definition back, still matches the frozen one
    _user_definition(cfg_dir)
    assert check_frozen(paths, load_campaign(cfg))
    # a changed definition cannot change the frozen campaign, but a new run of the config says so
    (cfg_dir / "engines" / "my-runner.yaml").write_text(
        yaml.safe_dump({**COMMAND, "label": "my-runner", "version": "2"})
    )
    assert load_frozen(paths) == campaign
    with pytest.raises(ConfigError, match="another configuration"):
        check_frozen(paths, load_campaign(cfg))
    # a frozen file from before the marker (complete mapping, no marker) whose definition is
    # gone is taken as it is
    old = yaml.safe_load(frozen_text)
    del old["engine"]["definition_merged"]
    paths.config.write_text(yaml.safe_dump(old))
    shutil.rmtree(cfg_dir / "engines")
    assert load_frozen(paths) == campaign


def test_quantum_espresso_input_has_a_cell_on_every_step_and_periodic_kpoints(tmp_path):
    """The shipped QE definition (no pw.x needed): a flake without a cell gets a box, Γ only and
    Martyna–Tuckerman; the same structure handed on (no cell again) gets the box again; a
    periodic host keeps its cell and takes the k-points given beside 'definition:'."""
    from ase.io import read

    from ionwell.config.campaign import FlakeBuilder
    from ionwell.config.definitions import resolve_engines
    from ionwell.science.host import build_flake

    def engine(over: dict | None = None):
        data = {
            "name": "qe",
            "host": {"builder": {"shells": 1, "layers": 1}},
            "engine": {"definition": "quantum-espresso", **(over or {})},
        }
        return get_engine(parse_campaign(resolve_engines(data, tmp_path), "qe"))

    flake = build_flake(FlakeBuilder(layers=1, shells=1))
    assert flake.cell.rank == 0
    qe = engine()
    for step, atoms in ((0, flake), (1, flake + Atoms("Li", positions=[[0, 0, 1.8]]))):
        work = tmp_path / f"flake{step}"
        qe.prepare(atoms, work, ComputeContext(step=step))
        text = (work / "pw.in").read_text()
        assert "assume_isolated  = 'mt'" in text and "K_POINTS gamma" in text
        assert "input_dft        = 'pbe'" in text
        written = read(work / "pw.in", format="espresso-in")
        lengths = np.ptp(atoms.positions, axis=0) + 12.0
        np.testing.assert_allclose(written.cell.lengths(), lengths, atol=1e-6)

    sheet = Atoms("C2", positions=[[0, 0, 5], [1.23, 0.71, 5]], pbc=True)
    sheet.cell = [[2.46, 0, 0], [-1.23, 2.1304, 0], [0, 0, 10]]
    # an explicit mesh in place of the definition's k-point spacing (its header says how)
    mesh = {"settings": {"kpoint_spacing": None}, "input": {"parameters": {"kpts": [6, 6, 1]}}}
    qe = engine(mesh)
    qe.prepare(sheet, tmp_path / "sheet", ComputeContext(step=0))
    text = (tmp_path / "sheet" / "pw.in").read_text()
    assert "assume_isolated  = 'none'" in text and "K_POINTS automatic\n6 6 1" in text
    written = read(tmp_path / "sheet" / "pw.in", format="espresso-in")
    np.testing.assert_allclose(np.asarray(written.cell), np.asarray(sheet.cell), atol=1e-6)
    np.testing.assert_allclose(written.positions, sheet.positions, atol=1e-6)


def test_restart_files_that_do_not_converge_are_dropped_for_a_fresh_guess(tmp_path):
    """An attempt from restart files that does not converge is tried once more, same settings,
    from the program's own guess (run_engine); the files are removed, the retry is recorded as
    a remedy and the step as a cold start. The restart file here is a real PySCF checkpoint of
    the same water whose orbitals were replaced by random orthonormal ones (seed 0): a state
    an interrupted SCF can leave. Measured with this runner (LDA/STO-3G, grid level 1): water
    from the fresh guess converges in 6 cycles, from that checkpoint in 8, so with max_cycle 6
    only the fresh start converges."""
    import scipy.linalg
    from pyscf import gto
    from pyscf.scf import chkfile

    from ionwell.engines.run import run_engine

    template = TEMPLATE.replace("grid_level 1\n", "grid_level 1\nmax_cycle 6\n")
    assert "max_cycle 6" in template
    campaign = _campaign(
        tmp_path, {**COMMAND, "input": {"file": "job.inp", "template_text": template}}
    )
    water = molecule("H2O")
    ctx = ComputeContext(step=0)
    work = tmp_path / "engine"

    cold = run_engine(campaign, water, tmp_path / "cold", ctx)
    assert cold.result.scf_converged and cold.remedies == []

    # the checkpoint a stopped attempt left, gone astray
    work.mkdir()
    shutil.copy(tmp_path / "cold" / "runner.chk", work / "runner.chk")
    mol = chkfile.load_mol(str(work / "runner.chk"))
    assert isinstance(mol, gto.Mole) and mol.natm == 3
    scf = chkfile.load(str(work / "runner.chk"), "scf")
    s = mol.intor("int1e_ovlp")
    q, _ = np.linalg.qr(np.random.default_rng(0).normal(size=s.shape))
    chkfile.dump(
        str(work / "runner.chk"), "scf/mo_coeff", scipy.linalg.sqrtm(np.linalg.inv(s)).real @ q
    )
    assert scf["mo_coeff"].shape == s.shape

    out = run_engine(campaign, water, work, ctx)
    log = (work / "job.log").read_text()
    assert out.result.scf_converged and not out.result.warm_started
    assert out.remedies == [
        "SCF retry with a fresh guess (the restart files did not converge): converged"
    ]
    assert out.result.guess == "cold: an attempt from restart files did not converge"
    assert any("they were removed (runner.chk)" in n for n in out.result.notes)
    assert "initial guess: superposition of atoms" in log and "restart: initial" not in log
    assert "restart no" in (work / "job.inp").read_text()
    # the same SCF solution as the fresh run: 1e-6 eV
    assert out.result.energy == pytest.approx(cold.result.energy, abs=1e-6)


def test_an_excited_state_the_program_calls_converged_is_redone_from_a_fresh_guess(
    tmp_path, monkeypatch, caplog
):
    """converged.aufbau: a gap below -tolerance (an empty orbital under a filled one) is an
    excited state, counted as not converged; the first try was from restart files, so the
    retry starts from the program's own guess. The runner with RUNNER_EXCITE=restart ends a
    restarted water in a real excited state (maximum overlap method; measured with the same
    scheme in PySCF at grid levels 1 and 3: 28.7 eV above the ground state, gaps -19.1 eV,
    ground-state gap 9.9 eV)
    and says 'SCF converged'. Without the aufbau check that state is taken as the result."""
    from ionwell.engines.run import run_engine

    aufbau = {"file": "job.log", "regex": r"^gap\s+(\S+) hartree", "unit": "hartree"}
    checked = _campaign(
        tmp_path, {**COMMAND, "converged": {**COMMAND["converged"], "aufbau": aufbau}}
    )
    water = molecule("H2O")
    ctx = ComputeContext(step=0)
    cold = run_engine(checked, water, tmp_path / "cold", ctx)
    gaps = re.findall(r"^gap\s+(\S+) hartree", (tmp_path / "cold" / "job.log").read_text(), re.M)
    assert cold.result.scf_converged and cold.remedies == [] and float(gaps[0]) > 0

    monkeypatch.setenv("RUNNER_EXCITE", "restart")
    # no check: the excited state passes for a converged result, far above the ground state
    unchecked = _campaign(tmp_path, COMMAND)
    (tmp_path / "plain").mkdir()
    shutil.copy(tmp_path / "cold" / "runner.chk", tmp_path / "plain" / "runner.chk")
    plain = run_engine(unchecked, water, tmp_path / "plain", ctx)
    assert plain.result.scf_converged and plain.result.warm_started
    assert plain.result.energy - cold.result.energy > 10.0

    work = tmp_path / "engine"
    work.mkdir()
    shutil.copy(tmp_path / "cold" / "runner.chk", work / "runner.chk")
    with caplog.at_level("WARNING", logger="ionwell"):
        out = run_engine(checked, water, work, ctx)
    assert out.result.scf_converged and not out.result.warm_started
    assert out.remedies == [
        "SCF retry with a fresh guess (the restart files did not converge): converged"
    ]
    found = [r.getMessage() for r in caplog.records if "HOMO-LUMO gap" in r.getMessage()]
    assert len(found) == 1 and "an empty orbital below a filled one" in found[0]
    assert float(re.search(r"gap (-\d+\.\d+) eV", found[0]).group(1)) < -5.0
    # the ground state of the fresh run: 1e-6 eV
    assert out.result.energy == pytest.approx(cold.result.energy, abs=1e-6)


def test_an_aufbau_pattern_needs_one_group(tmp_path):
    bad = {"file": "job.log", "regex": r"^gap\s+\S+ hartree"}
    with pytest.raises(ConfigError, match="capturing group"):
        _campaign(tmp_path, {**COMMAND, "converged": {**COMMAND["converged"], "aufbau": bad}})
