"""Spec files: schema, semantic checks, messages, packaged scenarios, template.

References: the key set and example values are the spec contract of issue 2
(project-internal contract, checked literally); the log grid is checked against
the closed form 10**linspace(log10 start, log10 stop, num) (elementary, no source
needed beyond the definition of a logarithmic grid).
"""

from __future__ import annotations

import math
import tomllib
from pathlib import Path

import numpy as np
import pytest

from schedforge.errors import InputError
from schedforge.spec import TEMPLATE, builtin_scenarios, load_spec, parse_spec
from schedforge.spec_model import (
    BathSpec,
    DeviceSpec,
    ProblemSpec,
    ScheduleSpec,
    Spec,
    SweepSpec,
    WaveformSpec,
)

ISSUE_EXAMPLE = """
version = 1
[device]
curves = "linear"
A0_ghz = 3.5
B0_ghz = 2.5
[problem]
qubits = 1
h = [0.7]
J = []
[bath]
spectrum = "ohmic"
coupling = "x"
eta = 1e-4
cutoff_ghz = 8.0
temperature_mk = 12.0
[schedule]
family = "beta"
k_start = 0
k_end = 2
tf_ns = 1000.0
[sweep]
tf_ns = [300.0, 1000.0, 3000.0]
k_end = [0, 1, 2]
"""


def parse(text: str, base_dir: Path | None = None) -> Spec:
    return parse_spec(tomllib.loads(text), base_dir)


def error_of(text: str, base_dir: Path | None = None) -> InputError:
    with pytest.raises(InputError) as info:
        parse(text, base_dir)
    return info.value


# -- valid specs ---------------------------------------------------------------
def test_issue_example_parses_to_its_values() -> None:
    spec = parse(ISSUE_EXAMPLE)
    assert spec.device == DeviceSpec("linear", 3.5, 2.5)
    assert spec.problem == ProblemSpec(1, (0.7,), ())
    assert spec.bath == BathSpec("ohmic", "x", 1e-4, 8.0, 12.0, False)
    assert spec.schedule == ScheduleSpec("beta", 0, 2, 1000.0)
    assert spec.sweep == SweepSpec(tf_ns=(300.0, 1000.0, 3000.0), k_end=(0, 1, 2))
    assert spec.waveform is None


def test_version_only_gives_the_dataclass_defaults() -> None:
    assert parse("version = 1") == Spec()


def test_template_is_valid_and_shows_the_defaults() -> None:
    assert parse(TEMPLATE) == Spec()
    # every key of every always-present section appears in the template
    for section in ("device", "problem", "bath", "schedule", "initial", "numerics"):
        assert f"[{section}]" in TEMPLATE


def test_log_grid_matches_closed_form() -> None:
    spec = parse("version = 1\n[sweep]\ntf_ns = {start = 100.0, stop = 10000.0, num = 9}\n")
    expected = 10.0 ** np.linspace(2.0, 4.0, 9)
    np.testing.assert_allclose(spec.sweep.tf_ns, expected, rtol=1e-12)  # 12 digits kept
    assert spec.sweep.tf_ns[0] == 100.0 and spec.sweep.tf_ns[-1] == 10000.0


def test_log_grid_values_are_round() -> None:
    # geomspace gives 2000.0000000000002 and 2999.999999999998 for these grids
    spec = parse("version = 1\n[sweep]\ntf_ns = {start = 1000.0, stop = 8000.0, num = 4}\n")
    assert spec.sweep.tf_ns == (1000.0, 2000.0, 4000.0, 8000.0)
    spec = parse("version = 1\n[sweep]\ntf_ns = {start = 1000.0, stop = 27000.0, num = 4}\n")
    assert spec.sweep.tf_ns == (1000.0, 3000.0, 9000.0, 27000.0)


def test_full_spec_with_every_section() -> None:
    spec = parse(
        """
version = 1
[problem]
qubits = 3
h = [0.1, -0.2, 0]
J = [[0, 1, -1.0], [1, 2, 0.5], [0, 2, 0.25]]
[bath]
spectrum = "none"
coupling = "z"
lamb_shift = true
[schedule]
family = "linear"
k_end = 1.5
tail = 0.3
points = [[0.0, 0.0], [0.5, 0.6], [1.0, 1.0]]
[initial]
state = "ground"
[numerics]
integrator = "general"
rtol = 1e-8
atol = 1e-12
[sweep]
tf_ns = [10, 20]
k_end = [0, 1.5]
family = ["beta", "linear"]
[waveform]
sample_rate_gsps = 2.4
dac_bits = 14
bandwidth_mhz = 300
filter = "single-pole"
max_slope_per_ns = 0.01
breakpoints = 16
breakpoint_tolerance = 1e-5
"""
    )
    assert spec.problem.J == ((0, 1, -1.0), (1, 2, 0.5), (0, 2, 0.25))
    assert spec.problem.h == (0.1, -0.2, 0.0)
    assert spec.bath.closed and spec.bath.lamb_shift
    assert spec.schedule.points == ((0.0, 0.0), (0.5, 0.6), (1.0, 1.0))
    assert spec.schedule.k_end == 1.5
    assert spec.initial.state == "ground"
    assert spec.sweep.family == ("beta", "linear")
    assert spec.sweep.tf_ns == (10.0, 20.0)
    assert spec.waveform == WaveformSpec(2.4, 14, 300.0, "single-pole", 0.01, 16, 1e-5)


def test_builtin_scenarios_load() -> None:
    assert {"driven-qubit", "ising-2q"} <= set(builtin_scenarios())
    driven = load_spec("builtin:driven-qubit")
    assert driven.source == "builtin:driven-qubit"
    assert driven.problem == ProblemSpec(1, (0.7,), ())
    assert driven.bath == BathSpec("ohmic", "x", 1e-4, 8.0, 12.0, False)
    assert driven.sweep.k_end == (0, 1, 2, 3)
    tf = np.asarray(driven.sweep.tf_ns)
    assert tf.size >= 5 and np.allclose(np.diff(np.log(tf)), math.log(tf[1] / tf[0]))
    ising = load_spec("builtin:ising-2q")
    assert ising.problem.qubits == 2 and len(ising.problem.J) == 1


def test_load_spec_from_file(write_spec) -> None:
    path = write_spec(ISSUE_EXAMPLE)
    spec = load_spec(path)
    assert spec.source == str(path)
    assert spec == parse(ISSUE_EXAMPLE)


def test_csv_curves_resolved_from_spec_folder(write_spec, tmp_path: Path) -> None:
    table = tmp_path / "sub" / "curves.csv"
    table.parent.mkdir()
    table.write_text("s,A_ghz,B_ghz\n0,1,0\n1,0,1\n")
    path = write_spec('version = 1\n[device]\ncurves = "curves.csv"\n', name="sub/spec.toml")
    spec = load_spec(path)
    assert spec.device.curves == str(table.resolve())


# -- errors ----------------------------------------------------------------------
def test_typo_gets_a_suggestion() -> None:
    err = error_of("version = 1\n[bath]\ntemprature_mk = 10.0\n")
    assert err.field == "bath.temprature_mk"
    assert "did you mean `temperature_mk`?" in str(err)
    assert str(err).startswith("`bath.temprature_mk` is not a known key")


def test_unknown_section_gets_a_suggestion() -> None:
    err = error_of("version = 1\n[schedul]\nk_end = 1\n")
    assert err.field == "schedul"
    assert "did you mean `schedule`?" in str(err)


@pytest.mark.parametrize(
    ("text", "field", "fragment"),
    [
        ("", "version", "required"),
        ("version = 2", "version", "must be 1"),
        ('version = "1"', "version", "integer"),
        ("version = 1\ndevice = 3", "device", "must be a table"),
        ('version = 1\n[device]\nA0_ghz = "3.5"', "device.A0_ghz", "must be a number"),
        ("version = 1\n[device]\nB0_ghz = 0", "device.B0_ghz", "> 0"),
        ("version = 1\n[device]\nA0_ghz = inf", "device.A0_ghz", "finite"),
        ("version = 1\n[device]\nA0_ghz = nan", "device.A0_ghz", "finite"),
        ("version = 1\n[problem]\nqubits = 0\nh = []", "problem.qubits", ">= 1"),
        ("version = 1\n[problem]\nqubits = 9", "problem.qubits", "<= 8"),
        ("version = 1\n[problem]\nqubits = 2.0", "problem.qubits", "integer"),
        ("version = 1\n[problem]\nqubits = true", "problem.qubits", "integer"),
        ("version = 1\n[problem]\nqubits = 2\nh = [0.1]", "problem.h", "one entry per qubit"),
        ("version = 1\n[problem]\nh = [true]", "problem.h[0]", "must be a number"),
        (
            "version = 1\n[problem]\nqubits = 2\nh = [0, 0]\nJ = [[0, 1, 1.0], [1, 2, 1.0]]",
            "problem.J[1]",
            "0 <= i < j < qubits",
        ),
        (
            "version = 1\n[problem]\nqubits = 2\nh = [0, 0]\nJ = [[1, 0, 1.0]]",
            "problem.J[0]",
            "0 <= i < j",
        ),
        (
            "version = 1\n[problem]\nqubits = 3\nh = [0, 0, 0]\n"
            "J = [[0, 1, 1.0], [1, 2, 1.0], [0, 1, 2.0]]",
            "problem.J[2]",
            "repeats the pair (0, 1)",
        ),
        ("version = 1\n[problem]\nqubits = 2\nh = [0, 0]\nJ = [[0, 1]]", "problem.J[0]", "[i, j"),
        (
            "version = 1\n[problem]\nqubits = 2\nh = [0, 0]\nJ = [[0.0, 1, 1.0]]",
            "problem.J[0][0]",
            "integer",
        ),
        ('version = 1\n[bath]\nspectrum = "ohmik"', "bath.spectrum", "did you mean `ohmic`"),
        ('version = 1\n[bath]\ncoupling = "w"', "bath.coupling", "one of 'x', 'y', 'z'"),
        ("version = 1\n[bath]\neta = -1e-4", "bath.eta", ">= 0"),
        ("version = 1\n[bath]\ncutoff_ghz = 0.0", "bath.cutoff_ghz", ">= 1e-06"),
        ("version = 1\n[bath]\ntemperature_mk = -5", "bath.temperature_mk", "> 0"),
        ("version = 1\n[bath]\nlamb_shift = 1", "bath.lamb_shift", "true or false"),
        ('version = 1\n[schedule]\nfamily = "betta"', "schedule.family", "did you mean `beta`"),
        ("version = 1\n[schedule]\nk_end = -1", "schedule.k_end", ">= 0"),
        ("version = 1\n[schedule]\nk_start = -0.5", "schedule.k_start", ">= 0"),
        ("version = 1\n[schedule]\ntf_ns = 0", "schedule.tf_ns", "> 0"),
        ("version = 1\n[schedule]\ntf_ns = -10.0", "schedule.tf_ns", "> 0"),
        ("version = 1\n[schedule]\ntail = 1.0", "schedule.tail", "< 1"),
        (
            "version = 1\n[schedule]\npoints = [[0.0, 0.0], [0.0, 1.0]]",
            "schedule.points[1][0]",
            "larger than the previous x",
        ),
        ("version = 1\n[schedule]\npoints = [[0.0, 2.0]]", "schedule.points[0][1]", "<= 1"),
        ('version = 1\n[initial]\nstate = "excited"', "initial.state", "'gibbs', 'ground'"),
        ('version = 1\n[numerics]\nintegrator = ""', "numerics.integrator", "auto"),
        ("version = 1\n[numerics]\nrtol = 0", "numerics.rtol", "> 0"),
        ("version = 1\n[sweep]\nk_end = [1]", "sweep.tf_ns", "required"),
        ("version = 1\n[sweep]\ntf_ns = []", "sweep.tf_ns", "must not be empty"),
        ("version = 1\n[sweep]\ntf_ns = [10.0, -1.0]", "sweep.tf_ns[1]", "> 0"),
        ("version = 1\n[sweep]\ntf_ns = [10.0, 10.0]", "sweep.tf_ns[1]", "repeats"),
        ("version = 1\n[sweep]\ntf_ns = 100.0", "sweep.tf_ns", "array of times"),
        (
            "version = 1\n[sweep]\ntf_ns = {start = 10.0, stop = 100.0}",
            "sweep.tf_ns.num",
            "required",
        ),
        (
            "version = 1\n[sweep]\ntf_ns = {start = 100.0, stop = 10.0, num = 3}",
            "sweep.tf_ns.stop",
            ">= start",
        ),
        (
            "version = 1\n[sweep]\ntf_ns = {start = 0.0, stop = 10.0, num = 3}",
            "sweep.tf_ns.start",
            "> 0",
        ),
        (
            "version = 1\n[sweep]\ntf_ns = {start = 1.0, stop = 10.0, num = 3, step = 2}",
            "sweep.tf_ns.step",
            "not a known key",
        ),
        ("version = 1\n[sweep]\ntf_ns = [1.0]\nk_end = []", "sweep.k_end", "must not be empty"),
        ("version = 1\n[sweep]\ntf_ns = [1.0]\nk_end = [0, -2]", "sweep.k_end[1]", ">= 0"),
        (
            'version = 1\n[sweep]\ntf_ns = [1.0]\nfamily = ["beta", "nope"]',
            "sweep.family[1]",
            "must be one of",
        ),
        ("version = 1\n[waveform]\ndac_bits = 0", "waveform.dac_bits", ">= 1"),
        ('version = 1\n[waveform]\nfilter = "boxcar"', "waveform.filter", "gaussian"),
        ("version = 1\n[waveform]\nsample_rate_gsps = -1.0", "waveform.sample_rate_gsps", "> 0"),
        ("version = 1\n[waveform]\nbreakpoints = 1", "waveform.breakpoints", ">= 2"),
        ("version = 1\n[numerics]\nsecular_tol_ghz = 0.0", "numerics.secular_tol_ghz", "> 0"),
        ('version = 1\n[numerics]\nsecular_tol_ghz = "a"', "numerics.secular_tol_ghz", "number"),
    ],
)
def test_bad_values_name_the_key_path(text: str, field: str, fragment: str) -> None:
    err = error_of(text)
    assert err.field == field
    message = str(err)
    assert message.startswith(f"`{field}`")
    assert fragment in message


def test_missing_csv_curves_named(write_spec) -> None:
    path = write_spec('version = 1\n[device]\ncurves = "nowhere.csv"\n')
    with pytest.raises(InputError) as info:
        load_spec(path)
    assert info.value.field == "device.curves"
    assert "nowhere.csv" in str(info.value) and "does not exist" in str(info.value)


def test_malformed_toml_names_file_and_line(write_spec) -> None:
    path = write_spec("version = 1\n[bath\neta = 1\n")
    with pytest.raises(InputError) as info:
        load_spec(path)
    assert info.value.field == str(path)
    assert "not valid TOML" in str(info.value) and "line 2" in str(info.value)


def test_missing_file_and_unknown_builtin(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="was not found") as info:
        load_spec(tmp_path / "absent.toml")
    assert info.value.field == "spec"
    with pytest.raises(InputError, match="did you mean `driven-qubit`"):
        load_spec("builtin:driven-qbit")


EXAMPLES = sorted((Path(__file__).resolve().parents[1] / "examples").glob("*.toml"))


@pytest.mark.parametrize("path", EXAMPLES, ids=lambda p: p.name)
def test_examples_are_valid_specs(path: Path) -> None:
    spec = load_spec(path)
    assert spec.version == 1 and spec.source == str(path)


def test_there_are_examples() -> None:
    assert len(EXAMPLES) >= 2


@pytest.mark.parametrize(
    ("text", "field", "fragment"),
    [
        ('version = 1\n[schedule]\nfamily = "points"', "schedule.points", "required"),
        (
            'version = 1\n[schedule]\nfamily = "poly"\nk_start = 1',
            "schedule.k_start",
            "",
        ),
        (
            'version = 1\n[sweep]\ntf_ns = [1.0]\nfamily = ["beta", "points"]',
            "schedule.points",
            "in the sweep, family = 'points'",
        ),
    ],
)
def test_family_rules_are_applied_at_load(text: str, field: str, fragment: str) -> None:
    err = error_of(text)
    assert err.field == field
    assert fragment in str(err)


def test_secular_tolerance_is_read_and_hashed_only_when_set() -> None:
    # numerics.secular_tol_ghz reaches the system (in rad/ns) and the physics hash, and
    # a spec without it keeps the hash it had before the key existed
    plain = parse("version = 1")
    set_ = parse("version = 1\n[numerics]\nsecular_tol_ghz = 1e-5")
    assert set_.numerics.secular_tol_ghz == 1e-5
    assert "secular_tol_ghz" not in plain.physics_dict()["numerics"]
    assert plain.physics_hash() != set_.physics_hash()


# -- the physics hash across releases -----------------------------------------------------
#: Hashes written into stores before this test existed (Spec() and builtin:ising-2q);
#: tests/test_robustness.py pins the same values.
STORED_HASHES = {
    "default": "9bbce94710b01e78b2a9a34b957c7f0571a2722b93e74b43588b32ba85c316fe",
    "ising-2q": "4497d262f68f4822d932cfbb88fe9e5a4af01b2da14984a27d0223cae63a0874",
}


def test_a_new_optional_field_at_its_default_keeps_existing_stores() -> None:
    # A later release adds fields with defaults (subclasses stand in for it here): a spec
    # that leaves them at their defaults has the physics of before, so its hash, by which
    # an existing store is recognised, must not change; set, the field changes the hash.
    import dataclasses

    @dataclasses.dataclass(frozen=True)
    class LaterBath(BathSpec):
        drift_ghz: float = 0.0

    @dataclasses.dataclass(frozen=True)
    class LaterSchedule(ScheduleSpec):
        warp: float = 0.0

    @dataclasses.dataclass(frozen=True)
    class LaterWaveform(WaveformSpec):
        skew_ns: float | None = None

    @dataclasses.dataclass(frozen=True)
    class LaterSpec(Spec):
        crosstalk: float | None = None  # a new optional section

    for name, spec in (("default", Spec()), ("ising-2q", load_spec("builtin:ising-2q"))):
        assert spec.physics_hash() == STORED_HASHES[name]
        later = LaterSpec(**{f.name: getattr(spec, f.name) for f in dataclasses.fields(Spec)})
        later = dataclasses.replace(
            later,
            bath=LaterBath(**dataclasses.asdict(spec.bath)),
            schedule=LaterSchedule(**dataclasses.asdict(spec.schedule)),
        )
        assert later.physics_hash() == STORED_HASHES[name]
        for changed in (
            dataclasses.replace(later, bath=dataclasses.replace(later.bath, drift_ghz=0.1)),
            dataclasses.replace(later, schedule=dataclasses.replace(later.schedule, warp=0.5)),
            dataclasses.replace(later, crosstalk=0.01),
        ):
            assert changed.physics_hash() != STORED_HASHES[name]
    # a waveform section gains a field: same rule inside an optional section
    plain = parse("version = 1\n[waveform]\ndac_bits = 8")
    later_wave = dataclasses.replace(plain, waveform=LaterWaveform(dac_bits=8))
    assert later_wave.physics_hash() == plain.physics_hash()
    skewed = dataclasses.replace(plain, waveform=LaterWaveform(dac_bits=8, skew_ns=0.2))
    assert skewed.physics_hash() != plain.physics_hash()


def test_physics_hash_ignores_what_is_not_physics() -> None:
    spec = load_spec("builtin:ising-2q")
    same = (
        spec.with_schedule(family="linear", k_end=5, tf_ns=3.0),  # a sweep's coordinates
        Spec(**{**vars(spec), "source": "elsewhere.toml"}),
        parse("version = 1\n[sweep]\ntf_ns = [10.0]"),  # compared with Spec() below
    )
    assert same[0].physics_hash() == spec.physics_hash()
    assert same[1].physics_hash() == spec.physics_hash()
    assert same[2].physics_hash() == Spec().physics_hash()
    # a float field written as an integer is the same physics (Python-built specs)
    assert Spec(bath=BathSpec(eta=1)).physics_hash() == Spec(bath=BathSpec(eta=1.0)).physics_hash()
    assert Spec(bath=BathSpec(eta=2e-4)).physics_hash() != Spec().physics_hash()


def test_spec_writes_back_as_toml_and_dict_with_nested_noise_tables(tmp_path):
    # spec.py owns both directions: the TOML copy a sweep folder keeps and the dict the
    # store records must read back to an equal spec, [noise.problems] included.
    import dataclasses
    import json

    from schedforge.spec import spec_from_dict, spec_to_toml

    text = (
        "version = 1\n[problem]\nqubits = 1\nh = [0.7]\n"
        "[sweep]\ntf_ns = [100.0, 200.0]\nk_end = [1, 2]\n"
        '[noise]\nlevel = 0.01\nterms = ["h"]\ndraws = 3\nlevels = [0.01, 0.02]\n'
        '[noise.problems]\ngraph = "chain"\nsizes = [2, 3]\n'
    )
    path = tmp_path / "a.toml"
    path.write_text(text)
    spec = load_spec(path)
    copy = tmp_path / "copy.toml"
    copy.write_text(spec_to_toml(spec))
    back = load_spec(copy)
    assert dataclasses.replace(back, source=spec.source) == spec
    assert "[noise.problems]" in copy.read_text()
    record = json.loads(json.dumps(dataclasses.asdict(spec)))
    assert spec_from_dict(record) == spec
