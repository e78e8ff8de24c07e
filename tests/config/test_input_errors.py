"""Every malformed input gives one clear `ionwell: error:` line, no traceback, exit 2, nothing
frozen (issue 14, the config / load-time / CLI half).

The schema sweep walks config/campaign.schema.json and sends, for every field, one value of a
wrong type and one out of range through `ionwell run` (in-process, `ionwell.cli.commands.main`); the
other cases are the holes the sweep of malformed inputs found, one test each.
"""

from __future__ import annotations

import contextlib
import json
import math
import os
import subprocess
from pathlib import Path

import pytest
import yaml
from shared import ionwell, run_campaign

from ionwell import cli
from ionwell.config.campaign import parse_campaign

SCHEMA = Path(__file__).parents[2] / "config" / "campaign.schema.json"

HOST = {"builder": {"shells": 1, "layers": 1}}

#: Valid configs that between them give every object of the schema a parent (each field is
#: swept in the first base that holds its parent object).
COMMAND_ENGINE = {
    "kind": "command",
    "label": "prog",
    "version": "1",
    "input": {"file": "job.inp", "template_text": "${structure}\n"},
    "argv": ["prog", "${input}"],
    "then": [["post", "job.out"]],
    "extra_inputs": {"extra.txt": "x"},
    "stdout": "job.log",
    "outputs": {
        "energy": {"file": "job.log", "regex": r"E = (\S+)", "unit": "hartree"},
        "forces": {"file": "job.xyz", "format": "extxyz"},
        "potential": {"file": "pot.cube", "format": "cube", "unit": "hartree", "sign": "auto"},
        "charges": [{"file": "job.log", "regex": r"q (\S+)", "scheme": "mulliken"}],
        "scf_iterations": {"file": "job.log", "regex": r"iter (\d+)"},
        "fermi_level": {"file": "job.log", "regex": r"Ef (\S+)"},
        "homo": {"file": "job.log", "regex": r"homo (\S+)"},
        "lumo": {"file": "job.log", "regex": r"lumo (\S+)"},
        "structure": {"file": "job.xyz", "format": "extxyz"},
        "version": {"file": "job.log", "regex": r"version (\S+)"},
    },
    "converged": {
        "scf": {"file": "job.log", "regex": "SCF converged"},
        "scf_failed": {"file": "job.log", "regex": "SCF failed"},
        "relax": {"file": "job.log", "regex": "relaxed"},
    },
    "restart": {
        "keep": ["*.chk"],
        "previous": ["*.chk"],
        "used": {"file": "job.log", "regex": "restarted"},
        "not_used": {"file": "job.log", "regex": "fresh guess"},
    },
    "soft_stop": {"files": ["EXIT"]},
    "cell": {
        "box": {"vacuum": 6.0},
        "placeholders": {"periodic": {"box": "no", "periodic": "yes"}},
    },
    "timeout": 100.0,
    "settings": {"maxiter": 100},
    "scf_remedies": [{"name": "more", "settings": {"maxiter": 300}}],
}

BASES = [
    {
        "name": "sweep-a",
        "description": "schema sweep",
        "seed": 1,
        "host": {**HOST, "formula_unit": {"C": 6}},
        "guest": {"element": "Li", "charge_mode": "neutral"},
        "engine": {"kind": "pyscf"},
        "launcher": {"kind": "local", "env": {"A": "b"}, "modules": ["m"], "scratch": "/tmp"},
        "placement": {
            "exclusion": {"C": 1.5},
            "boxes": [{"lower": [0, 0, 0], "upper": [1, 1, 1]}],
            "spheres": [{"centre": [0, 0, 0], "radius": 5.0}],
            "screen": {"top": 3, "engine": {"kind": "pyscf"}},
        },
        "checks": {"guest_host_min": 1.0, "envelope": 5.0, "guest_metal_distance": 3.0},
        "stop": {"guests": 3, "guests_per_unit": 1.0, "max_steps": 5, "well_above": 1.0},
        "resources": {"compute": {"partition": "p", "account": "a", "extra": "--x"}},
        "remote": {
            "host": "h",
            "user": "u",
            "key_file": "k",
            "known_hosts": "kh",
            "workdir": "/w",
            "setup": ["module load x"],
        },
        "analysis": {"reference": {"value": -1.0, "source": "s"}, "formula_unit": {"C": 6}},
    },
    {
        "name": "sweep-b",
        "host": {"builder": {"kind": "graphite", "cell": 2}},
        "engine": {"kind": "tblite"},
    },
    {
        "name": "sweep-c",
        "host": {"file": "host.xyz", "format": "xyz"},
        "engine": {
            "kind": "ase",
            "calculator": "ase.calculators.emt.EMT",
            "parameters": {"a": 1},
            "charge_keyword": "charge",
            "scf_remedies": [{"name": "more", "parameters": {"a": 2}}],
            "potential": {"file": "pot.cube"},
        },
        "analysis": {"reference": {"bulk": {"crystal": "bcc", "a": 3.5, "c": 5.0}}},
    },
    {"name": "sweep-d", "host": HOST, "engine": COMMAND_ENGINE},
    {"name": "sweep-e", "host": HOST, "analysis": {"reference": {"cohesive_energy": 1.6}}},
]


def test_the_bases_are_valid():
    for base in BASES:
        parse_campaign(base, base["name"])


# ---------------------------------------------------------------------------------------------
# walking the schema


def _resolve(node: dict, defs: dict) -> dict:
    while "$ref" in node:
        node = defs[node["$ref"].rsplit("/", 1)[1]]
    return node


def _alternatives(node: dict, defs: dict) -> list[dict]:
    """The non-null alternatives of a field's schema, references resolved."""
    node = _resolve(node, defs)
    out = []
    for key in ("anyOf", "oneOf"):
        for alt in node.get(key, []):
            out += _alternatives(alt, defs)
    if not out:
        out = [node]
    return [a for a in out if a.get("type") != "null"]


def _json_types(alts: list[dict]) -> set[str]:
    types: set[str] = set()
    for a in alts:
        t = a.get("type")
        if t is None and "const" in a:
            t = type(a["const"]).__name__.replace("str", "string")
        if t is None and "enum" in a:
            t = "string"
        if t is None:
            return {"any"}
        types |= set(t) if isinstance(t, list) else {t}
    if "number" in types:
        types.add("integer")
    return types


def _wrong_type(alts: list[dict]):
    types = _json_types(alts)
    if "any" in types:
        return None
    for value, t in (
        ("not-a-number", "string"),
        (42, "integer"),
        ([1], "array"),
        ({"x": 1}, "object"),
    ):
        if t not in types:
            return value
    return None


#: fields whose schema is a free string but whose value is checked: a wrong value for each
SEMANTIC = {"element": "Xx", "regex": "(unclosed", "scheme": ""}


def _out_of_range(alts: list[dict]):
    for a in alts:
        t = a.get("type")
        if t in ("number", "integer"):
            if "maximum" in a:
                return a["maximum"] + 1
            if "exclusiveMaximum" in a:
                return a["exclusiveMaximum"]
            if "minimum" in a:
                return a["minimum"] - 1
            if "exclusiveMinimum" in a:
                return a["exclusiveMinimum"]
            return math.nan  # no bounds: finite numbers only
        if "enum" in a or "const" in a:
            continue
        if t == "string":
            if "pattern" in a:
                return "!! not / matching"
            if a.get("minLength", 0) > 0:
                return ""
        if t == "array":
            if a.get("minItems", 0) > 0:
                return []
            if "prefixItems" in a:
                return [1]
        if t == "object":
            if a.get("additionalProperties") is False:
                return {"no_such_option": 1}
            vals = a.get("additionalProperties")
            if isinstance(vals, dict) and _json_types([vals]) & {"number", "integer"}:
                return {"C": math.nan}
            if a.get("minProperties", 0) > 0:
                return {}
    if any("enum" in a or "const" in a for a in alts):
        return "no-such-option"
    return None


def _get(data: dict, path: list):
    for p in path:
        if isinstance(data, list):
            if not isinstance(p, int) or p >= len(data):
                return None
            data = data[p]
        elif isinstance(data, dict) and p in data:
            data = data[p]
        else:
            return None
    return data


def _fields(node: dict, defs: dict, path: list, out: list, owners: tuple = ()):
    """(path, alternatives, owners) of every field under the object schema(s) of ``node``;
    ``owners``: (path, definition title) of each object on the way."""
    for alt in _alternatives(node, defs):
        title = alt.get("title", "")
        if title == "EngineDefinitionRef" or title in {t for _, t in owners}:
            continue
        here = (*owners, (tuple(path), title))
        for name, sub in alt.get("properties", {}).items():
            if name == "kind" and path and path[-1] == "engine":
                continue  # the discriminator: swept as the engine's own wrong values
            fpath = [*path, name]
            alts = _alternatives(sub, defs)
            out.append((fpath, alts, here))
            for a in alts:
                if a.get("type") == "array" and "items" in a:
                    _fields(a["items"], defs, [*fpath, 0], out, here)
                elif "properties" in a or "anyOf" in a or "oneOf" in a:
                    _fields(a, defs, fpath, out, here)


#: definitions that are one variant of a union: the base must hold that variant at its path
VARIANTS = {
    "PyscfEngineConfig": "pyscf",
    "TbliteEngineConfig": "tblite",
    "AseEngineConfig": "ase",
    "CommandEngineConfig": "command",
    "FlakeBuilder": "flake",
    "GraphiteBuilder": "graphite",
}
DEFAULT_KIND = {"engine": "pyscf", "builder": "flake"}


def _base_for(fpath: list, owners: tuple) -> int | None:
    """The first base that holds the field's parent object (or can: missing mappings are made)
    with the union variants the field belongs to."""
    for i, b in enumerate(BASES):
        ok = True
        for opath, title in owners:
            if title in VARIANTS:
                obj = _get(b, list(opath))
                kind = (
                    obj.get("kind", DEFAULT_KIND.get(str(opath[-1])))
                    if isinstance(obj, dict)
                    else None
                )
                ok = ok and kind == VARIANTS[title]
        if ok and _reachable(b, fpath[:-1]):
            return i
    return None


def _reachable(data, path: list) -> bool:
    """The object at ``path`` exists, or only mappings (not list items) are missing."""
    for p in path:
        if (
            isinstance(data, dict)
            and p in data
            or isinstance(data, list)
            and isinstance(p, int)
            and p < len(data)
        ):
            data = data[p]
        elif isinstance(data, dict) and not isinstance(p, int):
            data = {}
        else:
            return False
    return isinstance(data, dict)


def _cases() -> list[tuple[str, int, list, object]]:
    schema = json.loads(SCHEMA.read_text())
    defs = schema["$defs"]
    fields: list = []
    _fields(schema, defs, [], fields)
    cases, done = [], set()
    for fpath, alts, owners in fields:
        key = tuple(map(str, fpath))
        if key in done:
            continue
        base = _base_for(fpath, owners)
        if base is None:
            continue
        done.add(key)
        bad = _out_of_range(alts)
        if bad is None and fpath[-1] in SEMANTIC:
            bad = SEMANTIC[fpath[-1]]
        for what, value in (("wrong type", _wrong_type(alts)), ("out of range", bad)):
            if value is not None:
                cases.append((f"{'.'.join(map(str, fpath))} ({what})", base, fpath, value))
    return cases


CASES = _cases()


def _set(data: dict, path: list, value) -> dict:
    data = json.loads(json.dumps(data))
    node = data
    for p in path[:-1]:
        node = node.setdefault(p, {}) if isinstance(node, dict) else node[p]
    node[path[-1]] = value
    return data


def _expected_field(path: list) -> str:
    return ".".join(str(p) for p in path)


def test_the_sweep_covers_every_section():
    swept = {c[2][0] for c in CASES}
    schema = json.loads(SCHEMA.read_text())
    assert swept == set(schema["properties"]), set(schema["properties"]) - swept
    # every field of every definition of the schema is reached (EngineDefinitionRef aside)
    reached = {_expected_field(c[2]) for c in CASES}
    assert "engine.potential_grid.max_memory" in reached
    assert "placement.screen.engine.potential_grid.spacing" in reached
    assert "engine.outputs.charges.0.scheme" in reached
    assert "host.builder.cell" in reached
    assert len(CASES) >= 400, len(CASES)
    # every property of every definition is swept at least once (at some path)
    defs = schema["$defs"]
    fields: list = []
    _fields(schema, defs, [], fields)
    swept_paths = {tuple(map(str, c[2])) for c in CASES}
    owned = {(f[2][-1][1], str(f[0][-1])) for f in fields if tuple(map(str, f[0])) in swept_paths}
    everything = {
        (title, prop)
        for title, d in defs.items()
        if title != "EngineDefinitionRef"
        for prop, sub in d.get("properties", {}).items()
        if not (prop == "kind" and title.endswith("EngineConfig"))
        and "any" not in _json_types(_alternatives(sub, defs))  # takes any value
    }
    assert everything <= owned, sorted(everything - owned)


def test_schema_sweep_through_ionwell_run(tmp_path, capsys):
    """Each case: exit 2, exactly one `ionwell: error:` line naming the field, no traceback,
    nothing frozen."""
    (tmp_path / "host.xyz").write_text("2\n\nH 0 0 0\nH 0 0 0.74\n")
    failures = []
    for i, (label, base, path, value) in enumerate(CASES):
        data = _set(BASES[base], path, value)
        f = tmp_path / f"case{i}.yaml"
        f.write_text(yaml.safe_dump(data))
        capsys.readouterr()
        try:
            rc = cli.main(["run", str(f), "--root", str(tmp_path)])
        except Exception as err:  # a traceback in real life
            failures.append(f"{label}: raised {type(err).__name__}: {err}")
            continue
        out = capsys.readouterr()
        text = out.out + out.err
        errors = [x for x in text.splitlines() if x.startswith("ionwell: error:")]
        problem = None
        if rc != 2:
            problem = f"exit {rc}"
        elif len(errors) != 1:
            problem = f"{len(errors)} error lines"
        elif _expected_field(path) not in text:
            problem = "field not named"
        elif "Traceback" in text:
            problem = "traceback"
        if problem:
            failures.append(f"{label} = {value!r}: {problem}: {text.strip()[:300]}")
    assert not failures, f"{len(failures)} of {len(CASES)} cases:\n" + "\n".join(failures)
    assert not (tmp_path / "campaigns").exists()


# ---------------------------------------------------------------------------------------------
# the holes of the issue, one by one


def _run_main(capsys, *args) -> tuple[int, str]:
    capsys.readouterr()
    rc = cli.main(list(args))
    out = capsys.readouterr()
    return rc, out.out + out.err


def _one_error(text: str, *needles: str) -> str:
    lines = [x for x in text.splitlines() if x.startswith("ionwell: error:")]
    assert len(lines) == 1, text
    assert "Traceback" not in text
    for n in needles:
        assert n in text, text
    return lines[0]


@pytest.mark.parametrize(
    ("text", "needles"),
    [
        (b"name: c\xff\n", ["c.yaml", "line 1", "0xff", "UTF-8"]),
        (b"name: c\nhost: {builder: {shells: 1}}\n\xfe\n", ["line 3", "0xfe"]),
        (b"name: c\nname: d\nhost: {builder: {shells: 1}}\n", ["line 2", "'name'", "twice"]),
        (b"name: c\nhost: {builder: {shells: 1, shells: 2}}\n", ["line 2", "'shells'"]),
        (b"name: c\nhost: {builder: {shells: 1}}\nstop: {well_above: .nan}\n", ["stop.well_above", "finite"]),
        (b"name: c\nhost: {builder: {shells: 1}}\nplacement: {within: .inf}\n", ["placement.within", "finite"]),
        (b"name: c\nhost: {builder: {shells: 1}}\nrelax: {fmax: -.inf}\n", ["relax.fmax"]),
        (
            b"name: c\nhost: {builder: {shells: 1}}\nplacement: {boxes: [{lower: [0, 0, .nan], upper: [1, 1, 1]}]}\n",
            ["placement.boxes.0.lower"],
        ),
        (b"name: c\nhost: {builder: {shells: 1}}\nstop: {guests: 5, max_steps: 0}\n", ["stop", "max_steps 0"]),
        (
            b"name: c\nhost: {builder: {shells: 1}}\nengine: {potential_grid: {spacing: 0.021, margin: 20}}\n",
            ["engine.potential_grid", "GiB", "max_memory"],
        ),
    ],
    ids=[
        "non-utf8", "non-utf8-later-line", "duplicate-top-key", "duplicate-nested-key", "nan",
        "inf", "minus-inf", "nan-in-tuple", "stop-unreachable", "grid-memory-single-atom",
    ],
)  # fmt: skip
def test_load_time_errors(tmp_path, capsys, text, needles):
    f = tmp_path / "c.yaml"
    f.write_bytes(text)
    rc, out = _run_main(capsys, "run", str(f), "--root", str(tmp_path))
    assert rc == 2
    _one_error(out, *needles)
    assert not (tmp_path / "campaigns").exists()


def test_merge_keys_may_override(tmp_path):
    """A YAML merge key (<<) brings keys that the mapping may override: not a duplicate."""
    from ionwell.config.campaign import read_yaml

    f = tmp_path / "m.yaml"
    f.write_text("base: &b {xc: pbe, basis: sto-3g}\nengine:\n  <<: *b\n  xc: lda,vwn\n")
    assert read_yaml(f, "x")["engine"] == {"xc": "lda,vwn", "basis": "sto-3g"}


def test_stop_cap_below_target_is_allowed_with_a_note():
    from ionwell.config.campaign import stop_rule_note

    c = parse_campaign({"name": "c", "host": HOST, "stop": {"guests": 50, "max_steps": 3}})
    assert "at most 3 guests" in stop_rule_note(c)
    assert stop_rule_note(parse_campaign({"name": "c", "host": HOST})) is None


@pytest.mark.parametrize(
    ("engine", "guest", "needles"),
    [
        ({"xc": "no-such-functional"}, "Li", ["engine.xc", "no-such-functional"]),
        ({"xc": ""}, "Li", ["engine.xc"]),
        ({"basis": "no-such-basis"}, "Li", ["engine.basis", "no-such-basis"]),
        ({"basis": "sto-3g"}, "Cs", ["engine.basis", "Cs"]),  # PySCF's STO-3G has no Cs
        ({"charge": 100}, "Li", ["engine.charge", "+100", "electrons"]),
        ({"charge": -200}, "Li", ["engine.charge", "orbitals"]),
        ({"potential_grid": {"spacing": 0.05, "margin": 10}}, "Li", ["engine.potential_grid", "GiB"]),
        ({"kind": "tblite", "charge": 100}, "Li", ["engine.charge"]),
        ({"kind": "tblite"}, "Fr", ["engine.method", "Fr"]),
    ],
    ids=[
        "xc", "xc-empty", "basis", "basis-without-guest", "charge-no-electrons",
        "charge-basis-full", "grid-memory-host", "tblite-charge", "tblite-element",
    ],
)  # fmt: skip
def test_engine_settings_checked_before_freezing(tmp_path, capsys, engine, guest, needles):
    """Deterministic engine errors are found before the campaign folder is written."""
    f = tmp_path / "c.yaml"
    f.write_text(
        yaml.safe_dump({"name": "c", "host": HOST, "guest": {"element": guest}, "engine": engine})
    )
    rc, out = _run_main(capsys, "run", str(f), "--root", str(tmp_path))
    assert rc == 2
    _one_error(out, "c.yaml", *needles)
    assert not (tmp_path / "campaigns").exists()


def test_engines_check_keep_into_an_impossible_folder(tmp_path, capsys):
    (tmp_path / "a-file").write_text("")
    rc, out = _run_main(
        capsys, "engines", "check", "pyscf", "--keep", str(tmp_path / "a-file" / "x")
    )
    assert rc == 2
    _one_error(out, "--keep", "a-file", "cannot create")


def test_verify_names_a_record_with_a_non_utf8_byte(tmp_path, capsys):
    from ionwell.store.campaign import CampaignPaths
    from ionwell.store.ledger import LedgerRecord, append_record

    paths = CampaignPaths(tmp_path / "c")
    paths.root.mkdir()
    for n in range(2):
        rec = LedgerRecord(
            step=n, parent="", outcome="continue", guests=n, energy=-1.0, files={},
            engine="e", engine_version="0", ionwell_version="0", host="h", started="t",
            finished="t", wall_time=0.0,
        )  # fmt: skip
        append_record(paths.ledger, rec)
    data = paths.ledger.read_bytes().replace(b'"host":"h"', b'"host":"h\xff"', 1)
    paths.ledger.write_bytes(data)
    rc, out = _run_main(capsys, "verify", str(paths.root))
    assert rc == 1
    assert "Traceback" not in out
    assert "step 0, file ledger.jsonl: line 1 is not UTF-8 text" in out


# ---------------------------------------------------------------------------------------------
# through Snakemake: not retried, status.json re-published, a full disk


def test_a_deterministic_compute_error_is_not_retried(tmp_path):
    """A calculator without a potential map and no engine.potential file fails the same way on
    every try: one attempt, one clear line, exit 2 (not Snakemake's three attempts)."""
    cfg = tmp_path / "c.yaml"
    cfg.write_text(
        yaml.safe_dump(
            {
                "name": "once",
                "host": HOST,
                "engine": {
                    "kind": "ase",
                    "calculator": "ase.calculators.emt.EMT",
                },
                "relax": {"enabled": False},
            }
        )
    )
    proc = ionwell("run", str(cfg), "--root", str(tmp_path))
    assert proc.returncode == 2, proc.stderr
    line = _one_error(proc.stderr, "engine.potential", "offers no potential map")
    assert "step 0" in line
    events = [
        json.loads(x) for x in (tmp_path / "campaigns/once/events.jsonl").read_text().splitlines()
    ]
    assert [e["event"] for e in events].count("started") == 1, events
    status = ionwell("status", str(tmp_path / "campaigns/once"))
    assert "failed at step 0" in status.stdout and "engine.potential" in status.stdout
    # the failure is reported once (compute ends normally; collect, never retried, reports it)
    assert proc.stderr.count("step 0000 failed") == 1, proc.stderr


def test_a_deleted_status_json_is_republished(tmp_path):
    cfg = tmp_path / "c.yaml"
    cfg.write_text(
        yaml.safe_dump(
            {
                "name": "pub",
                "host": HOST,
                "engine": {"kind": "tblite"},
                "relax": {"enabled": False},
                "stop": {"guests": 1},
            }
        )
    )
    run_campaign(cfg, tmp_path)
    status = tmp_path / "campaigns/pub/steps/0000/status.json"
    before = json.loads(status.read_text())
    status.unlink()
    proc = run_campaign(cfg, tmp_path)
    assert "re-published the missing status.json of step(s) 0" in proc.stdout
    assert json.loads(status.read_text()) == before
    assert ionwell("verify", str(tmp_path / "campaigns/pub")).returncode == 0


@contextlib.contextmanager
def _small_filesystem(where: Path, size: str):
    """A real tmpfs of ``size`` mounted at ``where`` (needs root; skipped elsewhere)."""
    where.mkdir()
    if os.geteuid() != 0:
        pytest.skip("mounting a small file system needs root")
    proc = subprocess.run(
        ["mount", "-t", "tmpfs", "-o", f"size={size}", "tmpfs", str(where)],
        capture_output=True,
        text=True,
    )
    if proc.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs here: {proc.stderr.strip()}")
    try:
        yield where
    finally:
        subprocess.run(["umount", "-l", str(where)], check=False)


def test_disk_full_is_named_in_the_error_and_in_status(tmp_path):
    """A real full file system (a 400 KiB tmpfs): the cause is in ionwell's own error line and
    in `ionwell status`; after space is freed the campaign resumes and verifies."""
    cfg = tmp_path / "c.yaml"
    cfg.write_text(
        yaml.safe_dump(
            {
                "name": "full",
                "host": HOST,
                "engine": {"kind": "tblite"},
                "relax": {"enabled": False},
                "stop": {"guests": 3},
            }
        )
    )
    with _small_filesystem(tmp_path / "fs", "400k") as fs:
        proc = ionwell("run", str(cfg), "--root", str(fs))
        assert proc.returncode == 1, proc.stderr
        line = _one_error(proc.stderr)
        assert "no space left on device" in line.lower(), proc.stderr
        folder = fs / "campaigns" / "full"
        if (folder / "campaign.yaml").exists():
            st = ionwell("status", str(folder))
            assert "no space left on device" in st.stdout.lower(), st.stdout + st.stderr
        subprocess.run(["mount", "-o", "remount,size=64m", str(fs)], check=True)
        run_campaign(cfg, fs)
        assert ionwell("verify", str(folder)).returncode == 0


def test_engine_definitions_and_analysis_settings_read_the_same_way(tmp_path, capsys):
    """Definition files and analysis settings go through the same reader: UTF-8, keys once."""
    from ionwell.analysis.tables import read_settings_file
    from ionwell.errors import ConfigError

    (tmp_path / "engines").mkdir()
    (tmp_path / "engines" / "mine.yaml").write_text("kind: command\nlabel: a\nlabel: b\n")
    f = tmp_path / "c.yaml"
    f.write_text(yaml.safe_dump({"name": "c", "host": HOST, "engine": {"definition": "mine"}}))
    rc, out = _run_main(capsys, "run", str(f), "--root", str(tmp_path))
    assert rc == 2
    _one_error(out, "mine.yaml", "line 3", "'label'", "twice")
    assert not (tmp_path / "campaigns").exists()
    s = tmp_path / "analysis.yaml"
    s.write_bytes(b"valence: 1\nrim_width: 3\xe9\n")
    with pytest.raises(ConfigError, match=r"analysis.yaml: line 2: byte 0xe9 is not UTF-8"):
        read_settings_file(s)
