"""Reference standard lots by date, and method settings per plate format (96 / 384 wells).

The plates are the demo plant's (a simulation with known truth: pipeline.demo.plant draws each
reference well from the lot's assigned activity, so recovery is near 100 %). Check values:
- Beer–Lambert law, A = ε·c·l (any photometry handbook, common practice): at the same rate, an
  activity computed with half the path length is twice as large;
- the shipped method LIP-PNPB: REF-LIP-A (1200 U/mL) valid 2026-01-15 … 2027-01-31, then
  REF-LIP-B (1185 U/mL) from 2027-02-01.
"""

import dataclasses
import datetime as dt

import pandas as pd
import pytest

from pipeline.assay.plates import evaluate_activity_plate
from pipeline.controlled.catalog import Catalog
from pipeline.controlled.specs import PlateFormatSettings, ReferenceLot
from pipeline.demo import plant as demo
from pipeline.intake.layouts import load_layouts
from pipeline.intake.plate_methods import format_problems
from pipeline.intake.validation import parse_export
from pipeline.records.controlled_files import load_catalog, shipped_folders
from pipeline.vocabulary import ProblemCode

CATALOG = load_catalog()
METHOD = CATALOG.methods["LIP-PNPB"]
LAYOUTS = load_layouts(shipped_folders().layouts)
NIGHT = demo.build_scenario(nights=1)[0]  # assayed 2026-11-24
DAY = NIGHT.assay_date
PLATE = "AK-261124-L1"


def _parsed(prefix: str):
    name = next(n for n in NIGHT.files if n.startswith(prefix))
    return parse_export(name, NIGHT.files[name], LAYOUTS)


MAP, READ = _parsed(f"platemap-{PLATE}"), _parsed(f"kinread-{PLATE}")


def _evaluate(method, day=DAY, plate_map: pd.DataFrame | None = None):
    return evaluate_activity_plate(PLATE, MAP.frame if plate_map is None else plate_map, READ.frame, method, day)


def test_the_reference_lot_in_force_changes_over_on_its_dates():
    assert METHOD.reference_on(dt.date(2027, 1, 31)).lot == "REF-LIP-A"  # the last day of A
    assert METHOD.reference_on(dt.date(2027, 2, 1)).lot == "REF-LIP-B"  # the first day of B
    assert METHOD.reference_on(dt.date(2026, 1, 14)) is None  # before any lot


def test_a_plate_uses_the_reference_lot_valid_on_its_assay_date():
    result = _evaluate(METHOD)
    assert result.valid, result.reasons
    assert 90.0 <= result.reference_recovery_pct <= 110.0  # the simulated truth is 100 %
    # the same reference wells judged against another assigned value: recovery scales by 1200/1000
    reassigned = dataclasses.replace(METHOD, reference_lots=(ReferenceLot("REF-LIP-A", 1000.0, dt.date(2026, 1, 1)),))
    assert _evaluate(reassigned).reference_recovery_pct == pytest.approx(result.reference_recovery_pct * 1.2)


def test_no_reference_lot_valid_on_the_assay_date_makes_the_plate_invalid():
    expired = dataclasses.replace(METHOD, reference_lots=(
        ReferenceLot("REF-LIP-A", 1200.0, dt.date(2026, 1, 15), dt.date(2026, 11, 23)),
        ReferenceLot("REF-LIP-B", 1185.0, dt.date(2026, 11, 25))))
    result = _evaluate(expired)
    assert not result.valid
    assert result.reasons == (f"plate {PLATE}: no reference standard lot of method LIP-PNPB v1.3 is valid on the "
                              "assay date 2026-11-24",)
    assert all(not m.valid and m.reasons == result.reasons for m in result.activity.values())


def test_reference_wells_of_another_lot_than_the_one_in_force_make_the_plate_invalid():
    changed = dataclasses.replace(METHOD, reference_lots=(ReferenceLot("REF-LIP-B", 1185.0, dt.date(2026, 11, 1)),))
    result = _evaluate(changed)
    assert not result.valid
    assert "the reference wells hold REF-LIP-A; the reference standard lot valid on 2026-11-24 is REF-LIP-B" \
        in result.reasons[0]


def test_each_plate_format_uses_its_own_path_length_and_volumes():
    # The rate window's conversion limit depends on the path too (product = ΔA / (ε·l)); lifted here so
    # that both computations fit the same reads and only the conversion of a rate to U/mL differs.
    method = dataclasses.replace(METHOD, rate_window=dataclasses.replace(METHOD.rate_window, max_conversion_pct=50.0))
    by_96 = _evaluate(method)
    # half the path: every activity doubles, the reference's too (its assigned value doubled keeps the plate valid)
    half_path = dataclasses.replace(method, plate_formats=(PlateFormatSettings(96, 0.275, 0.200, 0.020),),
                                    reference_lots=(ReferenceLot("REF-LIP-A", 2400.0, dt.date(2026, 1, 15)),))
    halved = _evaluate(half_path)
    assert halved.valid and halved.reference_recovery_pct == pytest.approx(by_96.reference_recovery_pct)
    for lot, measurement in by_96.activity.items():
        assert halved.activity[lot].value == pytest.approx(2 * measurement.value)  # A = ε·c·l
    only_384 = dataclasses.replace(METHOD, plate_formats=(PlateFormatSettings(384, 0.36, 0.050, 0.005),))
    refused = _evaluate(only_384)
    assert not refused.valid
    assert "declares no settings for 96-well plates (it declares 384)" in refused.reasons[0]


def _catalog_with(method) -> Catalog:
    return Catalog.of_versions(CATALOG.specification_versions, {**CATALOG.method_versions, "LIP-PNPB": (method,)})


def test_a_read_of_a_format_the_method_does_not_declare_is_set_aside_with_its_code():
    parsed = [parse_export(name, data, LAYOUTS) for name, data in NIGHT.files.items()
              if name.startswith(("lots-", "platemap-", "kinread-"))]
    assert format_problems(parsed, CATALOG) == {}
    only_384 = dataclasses.replace(METHOD, plate_formats=(PlateFormatSettings(384, 0.36, 0.050, 0.005),))
    rejected = format_problems(parsed, _catalog_with(only_384))
    lipase_reads = sorted(p.file_name for p in parsed if p.file_name.startswith("kinread-AK-261124-L"))
    assert sorted(rejected) == lipase_reads  # the protease plates' method declares 96: not touched
    problem = rejected[lipase_reads[0]].problems[0]
    assert problem.code == ProblemCode.PLATE_FORMAT
    assert "its plate map says 96-well plate, and method LIP-PNPB v1.3 declares settings for 384-well plates only" \
        in problem.message
    assert rejected[lipase_reads[0]].report().startswith(f"File {lipase_reads[0]} was set aside (quarantined)")
