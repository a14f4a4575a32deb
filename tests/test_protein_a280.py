"""Protein by A280 as an alternative method: buffer blank, linear range, product's coefficient."""

import pandas as pd
import pytest

from pipeline.assay.protein_plates import evaluate_protein_plate
from pipeline.records.controlled_files import load_catalog

METHOD = load_catalog().methods["PROT-A280"]
# A 1 mg/mL solution of bovine serum albumin has A280 ≈ 0.66 in 1 cm (common practice; the
# coefficient is the product's own, here BSA's as an example).
BSA_A280_ML_PER_MG_PER_CM = 0.66


def _plate(sample_absorbances, dilution=10.0):
    rows, reads = [], []
    for i, a in enumerate((0.045, 0.047, 0.046)):
        rows.append(dict(plate_id="UV-1", plate_format=96, method_id="PROT-A280", well=f"A{i + 1:02d}", role="blank",
                         lot_id=None, substrate_mm=None, dilution_factor=1.0, nominal_mg_per_ml=None))
        reads.append(dict(plate_id="UV-1", well=f"A{i + 1:02d}", absorbance=a, wavelength_nm=280))
    for i, a in enumerate(sample_absorbances):
        rows.append(dict(plate_id="UV-1", plate_format=96, method_id="PROT-A280", well=f"B{i + 1:02d}", role="sample",
                         lot_id="LOT-A", substrate_mm=None, dilution_factor=dilution, nominal_mg_per_ml=None))
        reads.append(dict(plate_id="UV-1", well=f"B{i + 1:02d}", absorbance=a, wavelength_nm=280))
    return pd.DataFrame(rows), pd.DataFrame(reads)


def test_a280_follows_beer_lambert_with_the_products_coefficient():
    # c = (A − blank) / (ε · l) · DF = (0.409 − 0.046) / (0.66 × 0.55) × 10 = 10.0 mg/mL
    plate_map, reads = _plate([0.409, 0.409, 0.409])
    result = evaluate_protein_plate("UV-1", plate_map, reads, METHOD, {"LOT-A": BSA_A280_ML_PER_MG_PER_CM})
    protein = result.protein["LOT-A"]
    assert protein.valid and protein.value == pytest.approx(10.0, rel=1e-3)


def test_a280_outside_the_linear_range_asks_for_another_dilution():
    plate_map, reads = _plate([1.90, 1.92, 1.91])
    protein = evaluate_protein_plate("UV-1", plate_map, reads, METHOD, {"LOT-A": 0.66}).protein["LOT-A"]
    assert not protein.valid and protein.value is None
    assert "above the linear range" in protein.reasons[0] and "re-assay at another dilution" in protein.reasons[0]


def test_a280_needs_the_products_coefficient():
    plate_map, reads = _plate([0.409, 0.41, 0.408])
    protein = evaluate_protein_plate("UV-1", plate_map, reads, METHOD, {}).protein["LOT-A"]
    assert not protein.valid and "extinction coefficient" in protein.reasons[0]
