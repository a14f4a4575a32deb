"""The catalogue of bad settings and controlled files: each is refused with one message naming the field.

Every case starts from a file lotgate ships (or the demo's workspace settings), changes one thing
and expects a set-up error (a LotgateError, exit 2 on the command line) whose message holds the
given fragment: the field, what was found and what is allowed. A property test then inserts an
unknown key anywhere, or puts NaN or infinity in any number, and expects the same.
"""

from __future__ import annotations

import copy
import math
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from pipeline.assay.method_kinds import parse_method
from pipeline.controlled.specs import parse_specification
from pipeline.errors import LotgateError, SpecificationError
from pipeline.intake.layouts import load_layout
from pipeline.records.controlled_files import shipped_folders
from pipeline.records.workspace import open_workspace

REPO = Path(__file__).resolve().parents[1]
FOLDERS = shipped_folders()


def _shipped(folder: Path, name: str) -> dict:
    return yaml.safe_load((folder / name).read_text(encoding="utf-8"))


def _set(raw: dict, path: str, value: object) -> dict:
    """``raw`` with the value at a dotted path (list items by number) replaced; ``...`` removes the key."""
    out = copy.deepcopy(raw)
    *parents, last = path.split(".")
    node = out
    for part in parents:
        node = node[int(part)] if part.isdigit() else node[part]
    if value is ...:
        del node[last]
    else:
        node[int(last) if last.isdigit() else last] = value
    return out


def _rename(raw: dict, path: str, new: str) -> dict:
    *parents, last = path.split(".")
    out = copy.deepcopy(raw)
    node = out
    for part in parents:
        node = node[int(part)] if part.isdigit() else node[part]
    node[new] = node.pop(last)
    return out


# ------------------------------------------------------------------------------ workspace.yaml
WORKSPACE_CASES = [
    ("database URL mistyped", "databse_url: sqlite:///x.db\n",
     "unknown field 'databse_url' (did you mean 'database_url'?)"),
    ("signing key mistyped", "signing: {p21: qa.p12}\n", "unknown field 'p21' in 'signing' (did you mean 'p12'?)"),
    ("signing given as a string", "signing: keys/qa.p12\n",
     "'signing' must be a mapping with p12, passphrase_file and signer_name, found 'keys/qa.p12'"),
    ("time zone misspelt", "time_zone: Europe/Berln\n", "did you mean 'Europe/Berlin'"),
    ("time zone not a zone", "time_zone: Middle Earth\n", "names no time zone of the IANA database"),
    ("time zone a number", "time_zone: 5\n", "'time_zone' must be a time zone of the IANA database"),
    ("plant name empty", "plant_name: ''\n", "'plant_name' must not be empty"),
    ("plant name a list", "plant_name: [a, b]\n", "'plant_name' must be"),
    ("database URL not a URL", "database_url: not a url\n", "cannot be used"),
    ("database driver not installed", "database_url: mysql://qa@db/lotgate\n", "cannot be used"),
    ("database URL a number", "database_url: 5432\n", "'database_url' must be a database URL"),
    ("controlled kind unknown", "controlled: {products: specs}\n", "allowed: specifications, methods, layouts"),
    ("controlled folder a number", "controlled: {layouts: 3}\n", "'controlled.layouts' must be a folder name"),
    ("p12 a number", "signing: {p12: 12}\n", "'signing.p12' must be the path of a PKCS#12 file"),
    ("settings a list", "- plant_name\n", "expected a mapping of fields at the top level"),
    ("settings not YAML", "plant_name: [unclosed\n", "not valid YAML"),
]


@pytest.mark.parametrize(("text", "fragment"), [c[1:] for c in WORKSPACE_CASES], ids=[c[0] for c in WORKSPACE_CASES])
def test_a_bad_workspace_setting_is_refused(tmp_path, monkeypatch, text, fragment):
    monkeypatch.delenv("LOTGATE_DATABASE_URL", raising=False)
    (tmp_path / "workspace.yaml").write_text(text, encoding="utf-8")
    with pytest.raises(LotgateError) as refused:
        open_workspace(tmp_path)
    assert fragment in str(refused.value)
    assert "pydantic" not in str(refused.value) and "validation error" not in str(refused.value)


# ------------------------------------------------------------------------------ specifications
SPEC = _shipped(FOLDERS.specifications, "PGR-040.yaml")  # attributes: 2 = specific_activity, 8 = lead
SPEC_CASES = [
    ("limit NaN", _set(SPEC, "attributes.2.min", math.nan),
     "'attributes[3].min' (code 'specific_activity') must be a finite number, found nan"),
    ("limit infinite", _set(SPEC, "attributes.8.max", math.inf), "'attributes[9].max' (code 'lead') must be a finite"),
    ("limit key mistyped", _rename(SPEC, "attributes.8.max", "maxx"),
     "unknown field 'maxx' in 'attributes[9]' (code 'lead') (did you mean 'max'?)"),
    ("limits in the wrong order", _set(SPEC, "attributes.2.max", 30), "min 40 is above max 30"),
    ("digits negative", _set(SPEC, "attributes.0.digits", -1), "'attributes[1].digits' (code 'activity') must be at least zero"),
    ("digits a fraction", _set(SPEC, "attributes.0.digits", 1.5), "must be a whole number, found 1.5"),
    ("limit written as text", _set(SPEC, "attributes.0.min", "70"), "must be a number, found '70'"),
    ("trend not true or false", _set(SPEC, "attributes.0.trend", "yes"), "must be true or false, found 'yes'"),
    ("unknown Nelson rule", _set(SPEC, "trend_defaults.rules", [1, 9]), "trend rules must be among 1–8"),
    ("rule written as text", _set(SPEC, "trend_defaults.rules", ["2"]), "must be a whole number, found '2'"),
    ("baseline of one lot", _set(SPEC, "trend_defaults.baseline_n", 1), "'trend_defaults.baseline_n' must be at least 2"),
    ("wrong kind", _set(SPEC, "kind", "product-spec"), "'kind' must be 'product-specification'"),
    ("version as a number", _set(SPEC, "version", 1.4), "'version' must be a version written as text"),
    ("date as a day number", _set(SPEC, "effective_from", 20260515), "must be a date YYYY-MM-DD, found 20260515"),
    ("molecular weight zero", _set(SPEC, "molecular_weight_g_per_mol", 0), "must be above zero, found 0"),
    ("no attributes", _set(SPEC, "attributes", []), "'attributes' must not be empty"),
    ("top-level key mistyped", _rename(SPEC, "trend_defaults", "trend_default"), "did you mean 'trend_defaults'"),
    ("unknown source", _set(SPEC, "attributes.0.source", "activty"), "source must be one of"),
    ("LIMS attribute without a test", _set(SPEC, "attributes.8.test_code", ...), "needs a 'test_code'"),
    ("product name missing", _set(SPEC, "product_name", ...), "the field 'product_name' is missing"),
]


@pytest.mark.parametrize(("raw", "fragment"), [c[1:] for c in SPEC_CASES], ids=[c[0] for c in SPEC_CASES])
def test_a_bad_specification_is_refused(raw, fragment):
    with pytest.raises(SpecificationError, match="^PGR-040.yaml") as refused:
        parse_specification(raw, "PGR-040.yaml", "0" * 64)
    assert fragment in str(refused.value)


# ------------------------------------------------------------------------------ methods
KINETIC = _shipped(FOLDERS.methods, "PRT-SAAPF.yaml")
UV280 = _shipped(FOLDERS.methods, "PROT-A280.yaml")
ENDPOINT = _shipped(FOLDERS.methods, "PROT-DYE595.yaml")
FLUORESCENCE = _shipped(FOLDERS.methods, "PROT-FL485.yaml")
METHOD_CASES = [
    ("extinction negative", _set(KINETIC, "epsilon_per_mm_per_cm", -8.8), "'epsilon_per_mm_per_cm' must be above zero"),
    ("conversion limit NaN", _set(KINETIC, "rate_window.max_conversion_pct", math.nan),
     "'rate_window.max_conversion_pct' must be a finite number"),
    ("lag action unknown", _set(KINETIC, "rate_window.lag_burst_action", "ignore"), "'rate_window.lag_burst_action'"),
    ("recovery window reversed", _set(KINETIC, "suitability.recovery_pct", {"min": 110.0, "max": 90.0}),
     "'suitability.recovery_pct' has min 110 above max 90"),
    ("path length key mistyped", _rename(KINETIC, "plate_formats.0.path_length_cm", "path_lenght_cm"),
     "unknown field 'path_lenght_cm' in 'plate_formats[1]' (did you mean 'path_length_cm'?)"),
    ("plate format not 96 or 384", _set(KINETIC, "plate_formats.1.wells", 1536),
     "'plate_formats[2].wells' must be 96 or 384, found 1536"),
    ("plate format twice", _set(KINETIC, "plate_formats.1.wells", 96), "declares a plate format twice: [96, 96]"),
    ("no plate format declared", _set(KINETIC, "plate_formats", []), "'plate_formats' must not be empty"),
    ("reference lot valid backwards", _set(KINETIC, "suitability.reference_lots.0.valid_to", "2026-01-01"),
     "has valid_to 2026-01-01 before valid_from 2026-03-01"),
    ("no reference lot", _set(KINETIC, "suitability.reference_lots", []), "suitability.reference_lots"),
    ("reference lot without assigned value", _set(KINETIC, "suitability.reference_lots.0.assigned_u_per_ml", ...),
     "the field 'suitability.reference_lots[1].assigned_u_per_ml' is missing"),
    ("F-test level above one", _set(KINETIC, "kinetics.model_selection_alpha", 1.5),
     "'kinetics.model_selection_alpha' must be below 1"),
    ("minimum points a fraction", _set(KINETIC, "rate_window.min_points", 5.5), "must be a whole number, found 5.5"),
    ("A280 linear range reversed", _set(UV280, "linear_range_au.max", 0.05), "has min 0.1 above max 0.05"),
    ("A280 path length infinite", _set(UV280, "plate_formats.0.path_length_cm", math.inf),
     "'plate_formats[1].path_length_cm' must be a finite number"),
    ("curve model a number", _set(ENDPOINT, "curve.model", 4), "'curve.model' must be linear, quadratic or 4pl"),
    ("curve weighting unknown", _set(ENDPOINT, "curve.weighting", "1/x3"), "curve weighting must be null, 1/x, 1/x2 or 1/y2"),
    ("replicate CV NaN", _set(ENDPOINT, "suitability.replicate_cv_max_pct", math.nan), "must be a finite number"),
    ("replicate scatter unknown", _set(ENDPOINT, "suitability.replicate_scatter", "pooled"),
     "'suitability.replicate_scatter'"),
    ("reader saturation infinite", _set(FLUORESCENCE, "reader_max_rfu", math.inf), "'reader_max_rfu' must be a finite"),
    ("unknown reader setting", _set(FLUORESCENCE, "gain", 100), "unknown field 'gain'"),
    ("method kind wrong", _set(FLUORESCENCE, "kind", "method"), "'kind' must be 'assay-method'"),
]


@pytest.mark.parametrize(("raw", "fragment"), [c[1:] for c in METHOD_CASES], ids=[c[0] for c in METHOD_CASES])
def test_a_bad_method_is_refused(raw, fragment):
    with pytest.raises(SpecificationError, match="^METHOD.yaml: ") as refused:
        parse_method(raw, "METHOD.yaml", "0" * 64)
    assert fragment in str(refused.value)


# ------------------------------------------------------------------------------ export layouts
LAYOUT = _shipped(FOLDERS.layouts, "lims-results.yaml")
LAYOUT_CASES = [
    ("hints key mistyped", _rename(LAYOUT, "lotgate_export.hints", "hint"),
     "unknown field 'hint' in 'lotgate_export' (did you mean 'hints'?)"),
    ("size limit as text", _set(LAYOUT, "lotgate_export.max_bytes", "1MB"),
     "'lotgate_export.max_bytes' must be a whole number, found '1MB'"),
    ("no rows allowed", _set(LAYOUT, "lotgate_export.max_rows", 0), "'lotgate_export.max_rows' must be above zero"),
    ("file prefix missing", _set(LAYOUT, "lotgate_export.file_prefix", ...),
     "the field 'lotgate_export.file_prefix' is missing"),
    ("hint for an undeclared column", _set(LAYOUT, "lotgate_export.hints.colour", "a colour"),
     "names colour, which the pandera section does not declare"),
    ("layout version as a number", _set(LAYOUT, "lotgate_export.version", 1.1), "must be a version written as text"),
    ("no lotgate header", _set(LAYOUT, "lotgate_export", ...), "the field 'lotgate_export' is missing"),
    ("unknown top-level section", _set(LAYOUT, "pandra", {}), "unknown field 'pandra' (did you mean 'pandera'?)"),
]


KINETIC_LAYOUT = _shipped(FOLDERS.layouts, "kinetic-read.yaml")
CAP = "lotgate_export.max_reads_per_well"
READS_CAP_CASES = [
    ("reads cap missing", _set(KINETIC_LAYOUT, CAP, ...),
     "a layout of reads over time must cap the reads per well: the field 'lotgate_export.max_reads_per_well' is missing"),
    ("reads cap empty", _set(KINETIC_LAYOUT, CAP, None), "'lotgate_export.max_reads_per_well' is missing"),
    ("reads cap as text", _set(KINETIC_LAYOUT, CAP, "10k"), "'lotgate_export.max_reads_per_well' must be a whole number"),
    ("reads cap a fraction", _set(KINETIC_LAYOUT, CAP, 100.5), "'lotgate_export.max_reads_per_well' must be a whole number"),
    ("reads cap true", _set(KINETIC_LAYOUT, CAP, True), "'lotgate_export.max_reads_per_well' must be a whole number"),
    ("reads cap zero", _set(KINETIC_LAYOUT, CAP, 0), "'lotgate_export.max_reads_per_well' must be above zero, found 0"),
    ("reads cap negative", _set(KINETIC_LAYOUT, CAP, -5), "'lotgate_export.max_reads_per_well' must be above zero"),
    ("reads cap absurd", _set(KINETIC_LAYOUT, CAP, 10_000_000),
     "'lotgate_export.max_reads_per_well' must be at most 86400, found 10000000"),
]


@pytest.mark.parametrize(("raw", "fragment"), [c[1:] for c in READS_CAP_CASES], ids=[c[0] for c in READS_CAP_CASES])
def test_a_bad_reads_per_well_cap_is_refused(tmp_path, raw, fragment):
    path = tmp_path / "kinetic-read.yaml"
    path.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    with pytest.raises(SpecificationError, match="^schemas/kinetic-read.yaml: ") as refused:
        load_layout(path)
    assert fragment in str(refused.value)


def test_a_reads_cap_on_a_layout_without_reads_over_time_is_refused(tmp_path):
    path = tmp_path / "lims-results.yaml"
    path.write_text(yaml.safe_dump(_set(LAYOUT, CAP, 100), sort_keys=False), encoding="utf-8")
    with pytest.raises(SpecificationError, match="caps reads over time; this layout has no plate_id, time_s, well"):
        load_layout(path)


@pytest.mark.parametrize(("raw", "fragment"), [c[1:] for c in LAYOUT_CASES], ids=[c[0] for c in LAYOUT_CASES])
def test_a_bad_layout_header_is_refused(tmp_path, raw, fragment):
    path = tmp_path / "lims-results.yaml"
    path.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    with pytest.raises(SpecificationError, match="^schemas/lims-results.yaml: ") as refused:
        load_layout(path)
    assert fragment in str(refused.value)


def test_the_catalogue_holds_at_least_thirty_cases():
    assert len(WORKSPACE_CASES) + len(SPEC_CASES) + len(METHOD_CASES) + len(LAYOUT_CASES) >= 30


def test_every_shipped_file_passes_its_schema():
    for folder, loader in ((FOLDERS.specifications, parse_specification), (FOLDERS.methods, parse_method)):
        for path in sorted(folder.glob("*.yaml")):
            assert loader(yaml.safe_load(path.read_text(encoding="utf-8")), path.name, "0" * 64)
    for path in sorted(FOLDERS.layouts.glob("*.yaml")):
        assert load_layout(path).kind


# ------------------------------------------------------------------------------ property test
def _mappings(node: object, path: tuple = ()) -> list[tuple]:
    """Every mapping of fields inside a document, by its path.

    Not the pandera section (pandera's own schema) nor a layout's hints (keyed by column names,
    checked against the columns: see the catalogue above).
    """
    found = []
    if isinstance(node, dict):
        found.append(path)
        for key, value in node.items():
            if key not in ("pandera", "hints"):
                found += _mappings(value, (*path, key))
    elif isinstance(node, list):
        for index, value in enumerate(node):
            found += _mappings(value, (*path, index))
    return found


def _numbers(node: object, path: tuple = ()) -> list[tuple]:
    found = []
    if isinstance(node, dict):
        for key, value in node.items():
            if key != "pandera":
                found += _numbers(value, (*path, key))
    elif isinstance(node, list):
        for index, value in enumerate(node):
            found += _numbers(value, (*path, index))
    elif isinstance(node, int | float) and not isinstance(node, bool):
        found.append(path)
    return found


def _at(document: dict, path: tuple) -> object:
    for part in path:
        document = document[part]
    return document


def _refusal(kind: str, raw: dict, tmp: Path) -> str:
    with pytest.raises(LotgateError) as refused:
        if kind == "workspace":
            (tmp / "workspace.yaml").write_text(yaml.safe_dump(raw), encoding="utf-8")
            open_workspace(tmp)
        elif kind == "specification":
            parse_specification(raw, "SPEC.yaml", "0" * 64)
        elif kind == "layout":
            (tmp / "layout.yaml").write_text(yaml.safe_dump(raw), encoding="utf-8")
            load_layout(tmp / "layout.yaml")
        else:
            parse_method(raw, "METHOD.yaml", "0" * 64)
    return str(refused.value)


DOCUMENTS = {
    "workspace": {"plant_name": "Riverside", "time_zone": "Europe/Berlin",
                  "signing": {"signer_name": "QA"}, "controlled": {}},
    "specification": SPEC, "layout": LAYOUT,
    **{f"method {raw['method_id']}": raw for raw in (KINETIC, UV280, ENDPOINT, FLUORESCENCE)},
}
KEYS = st.text(alphabet="abcdefghijklmnopqrstuvwxyz_", min_size=1, max_size=12).map(lambda k: f"x_{k}")


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(name=st.sampled_from(sorted(DOCUMENTS)), key=KEYS, data=st.data())
def test_any_unknown_key_anywhere_is_refused_naming_it(tmp_path, name, key, data):
    raw = copy.deepcopy(DOCUMENTS[name])
    where = data.draw(st.sampled_from(_mappings(raw)))
    _at(raw, where)[key] = 1
    message = _refusal(name.split()[0], raw, tmp_path)
    assert f"unknown field '{key}'" in message and "allowed:" in message


@settings(max_examples=120, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(name=st.sampled_from(sorted(n for n in DOCUMENTS if n != "workspace")),
       bad=st.sampled_from([math.nan, math.inf, -math.inf]), data=st.data())
def test_any_non_finite_number_is_refused_naming_it(tmp_path, name, bad, data):
    raw = copy.deepcopy(DOCUMENTS[name])
    where = data.draw(st.sampled_from(_numbers(raw)))
    _at(raw, where[:-1])[where[-1]] = bad
    message = _refusal(name.split()[0], raw, tmp_path)
    named = f"[{where[-1] + 1}]'" if isinstance(where[-1], int) else f"{where[-1]}'"
    assert named in message and repr(bad) in message


# ------------------------------------------------------------------------------ on the command line
def test_a_specification_with_a_nan_limit_stops_the_night_before_anything_is_read(tmp_path):
    """The attack: ``min: .nan`` released a 33.6 U/mg lot as complying (certificate 'nan – 70.0')."""
    plant = tmp_path / "plant-specs"
    plant.mkdir()
    for path in FOLDERS.specifications.glob("*.yaml"):
        (plant / path.name).write_text(path.read_text(encoding="utf-8"), encoding="utf-8")
    spec = plant / "PGR-040.yaml"
    spec.write_text(spec.read_text(encoding="utf-8").replace("min: 40, max: 70", "min: .nan, max: 70"),
                    encoding="utf-8")
    (tmp_path / "workspace.yaml").write_text("controlled: {specifications: plant-specs}\n", encoding="utf-8")
    (tmp_path / "keys").mkdir()
    (tmp_path / "keys" / "use-demo-identity").touch()
    (tmp_path / "inbox").mkdir()
    (tmp_path / "inbox" / "lots-20261124.csv").write_bytes(b"lot_id\n")
    started = time.monotonic()
    done = subprocess.run([sys.executable, "-m", "flows.cli", "run", "--workspace", str(tmp_path)],
                          capture_output=True, text=True, timeout=120, cwd=REPO)
    assert done.returncode == 2, done.stdout + done.stderr
    assert "PGR-040.yaml: 'attributes[3].min' (code 'specific_activity') must be a finite number" in done.stderr
    assert "Traceback" not in done.stderr and done.stderr.count("\n") == 1
    assert (tmp_path / "inbox" / "lots-20261124.csv").exists() and not (tmp_path / "lotgate.db").exists()
    assert time.monotonic() - started < 15  # refused before Prefect starts (17–24 s on main)
