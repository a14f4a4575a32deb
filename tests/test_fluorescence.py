"""Protein by fluorescence against a standard curve: the method file, the plate's evaluator, a whole night.

Check values: the four-parameter logistic y = d + (a − d)/(1 + (x/c)^b) and its inverse
x = c·((a − d)/(y − d) − 1)^(1/b) (common practice for immunoassay and dye-binding standard
curves); the reference fit is scipy.optimize.curve_fit on the same standards (reference library).
Reads made here are noise-free, so the protein read back through the curve must equal the
concentration the reads were made from (to the fit's convergence, 1e-6 relative).
"""

import io
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import curve_fit

from pipeline.assay.fluorescence import evaluate_fluorescence_plate, parse_fluorescence_method
from pipeline.assay.method_kinds import kind_of, parse_method
from pipeline.assay.plate_reads import PlateContext, PlateReads
from pipeline.demo import plant as demo
from pipeline.errors import SpecificationError
from pipeline.records.controlled_files import load_catalog, shipped_folders
from pipeline.records.workspace import atomic_write, write_settings

REPO = Path(__file__).resolve().parents[1]
METHOD = load_catalog().methods["PROT-FL485"]
# An invented dye's response (RFU): blank 150, plateau 52 000, mid-point 1.2 mg/mL, slope 1.1.
A, D, C, B = 150.0, 52000.0, 1.2, 1.1
STANDARDS_MG_PER_ML = (0.0, 0.0, 0.125, 0.125, 0.25, 0.25, 0.5, 0.5, 0.75, 0.75, 1.0, 1.0, 1.5, 1.5)


def rfu(x_mg_per_ml):
    """The invented dye's 4PL response."""
    return D + (A - D) / (1.0 + (np.asarray(x_mg_per_ml, dtype=float) / C) ** B)


def _plate(samples: dict[str, list[tuple[str, float, float]]], *, excitation=485, emission=590,
           override: dict[str, float] | None = None) -> PlateReads:
    """A plate map and fluorescence read: standards in rows A–B, each lot's wells as (well, in-well mg/mL, DF)."""
    rows, reads = [], []
    for i, nominal in enumerate(STANDARDS_MG_PER_ML):
        well = f"{'AB'[i // 7]}{i % 7 + 1:02d}"
        rows.append(dict(well=well, role="standard", lot_id=None, dilution_factor=1.0, nominal_mg_per_ml=nominal))
        reads.append(dict(well=well, intensity_rfu=float(rfu(nominal))))
    for lot, wells in samples.items():
        for well, in_well, dilution in wells:
            rows.append(dict(well=well, role="sample", lot_id=lot, dilution_factor=dilution, nominal_mg_per_ml=None))
            reads.append(dict(well=well, intensity_rfu=float(rfu(in_well))))
    plate_map = pd.DataFrame(rows).assign(plate_id="FL-1", plate_format=96, method_id="PROT-FL485")
    read = pd.DataFrame(reads).assign(plate_id="FL-1", excitation_nm=excitation, emission_nm=emission)
    for well, value in (override or {}).items():
        read.loc[read["well"] == well, "intensity_rfu"] = value
    return PlateReads(plate_map, read, "PROT-FL485")


LOT = {"FLQ-001": [("C01", 0.56, 10.0), ("C02", 0.56, 10.0), ("C03", 0.56, 10.0)]}


class TestTheMethodFile:
    def test_the_shipped_method_is_a_fluorescence_protein_method(self):
        assert kind_of(METHOD).measurement == "fluorescence-endpoint"
        assert kind_of(METHOD).read_kind == "fluorescence-read"
        assert (METHOD.excitation_nm, METHOD.emission_nm, METHOD.curve_model) == (485.0, 590.0, "4pl")

    @pytest.mark.parametrize(("change", "match"), [
        ({"emission_nm": 470}, "emission wavelength must lie above the excitation"),
        ({"reader_max_rfu": 0}, "'reader_max_rfu' must be above zero"),
        ({"reader_max_rfu": None}, "'reader_max_rfu' is missing"),
        ({"curve": {"model": "spline", "min_r2": 0.99, "bias_limit_pct": 15, "lowest_bias_limit_pct": 20}},
         "curve model must be linear, quadratic or 4pl"),
    ])
    def test_a_bad_method_file_is_refused_naming_the_field(self, change, match):
        import yaml

        raw = {**yaml.safe_load((shipped_folders().methods / "PROT-FL485.yaml").read_text()), **change}
        with pytest.raises(SpecificationError, match=match):
            parse_fluorescence_method(raw, "PROT-FL485.yaml", "0" * 64)

    def test_an_unknown_measurement_names_every_kind(self):
        with pytest.raises(SpecificationError, match="kinetic, endpoint, uv280, fluorescence-endpoint, found 'nephelometry'"):
            parse_method({"kind": "assay-method", "measurement": "nephelometry"}, "X.yaml", "0" * 64)


class TestThePlate:
    def test_the_curve_matches_the_reference_fit_and_reads_the_lot_back(self):
        result = evaluate_fluorescence_plate("FL-1", _plate(LOT), METHOD, PlateContext())
        assert result.valid, result.reasons
        fitted = dict(zip(result.curve["param_names"], result.curve["params"], strict=True))
        reference, _ = curve_fit(lambda x, a, b, c, d: d + (a - d) / (1 + (x / c) ** b), np.array(STANDARDS_MG_PER_ML),
                                 rfu(STANDARDS_MG_PER_ML), p0=(100.0, 1.0, 1.0, 50000.0), maxfev=20000)
        assert [fitted[k] for k in ("a_au", "b_hill", "c_mg_per_ml", "d_au")] == pytest.approx(list(reference), rel=1e-5)
        protein = result.protein["FLQ-001"]
        assert protein.value == pytest.approx(5.6, rel=1e-6)  # 0.56 mg/mL in the well × dilution 10
        assert result.curve["signal_label"] == "fluorescence (RFU)"
        assert [s["signal"] for s in result.samples["FLQ-001"]] == pytest.approx([float(rfu(0.56))] * 3)

    def test_a_saturated_sample_well_leaves_its_lot_without_protein(self):
        plate = _plate({**LOT, "FLQ-002": [("D01", 0.4, 10.0), ("D02", 0.4, 10.0)]}, override={"D02": 60500.0})
        result = evaluate_fluorescence_plate("FL-1", plate, METHOD, PlateContext())
        assert result.valid and result.protein["FLQ-001"].value == pytest.approx(5.6, rel=1e-6)
        assert result.protein["FLQ-002"].value is None and not result.protein["FLQ-002"].valid
        assert "D02 at or above the reader's saturation (60000 RFU)" in result.protein["FLQ-002"].reasons[0]

    @pytest.mark.parametrize(("plate", "match"), [
        (_plate(LOT, override={"A07": 61000.0}), "standard well(s) A07 at or above the reader's saturation"),
        (_plate(LOT, excitation=490), "read at ex 490 / em 590 nm; method PROT-FL485 requires ex 485 / em 590 nm"),
        (_plate(LOT, override={"C02": np.nan}), "the read has no value for mapped well(s) C02"),
    ])
    def test_a_plate_that_cannot_be_read_invalidates_its_lots(self, plate, match):
        result = evaluate_fluorescence_plate("FL-1", plate, METHOD, PlateContext())
        assert not result.valid and match in result.reasons[0]
        assert result.protein["FLQ-001"].value is None


@pytest.mark.slow
def test_a_night_reads_protein_by_fluorescence_where_the_product_names_the_method(tmp_path):
    """The demo's first night with its protein plate read by fluorescence instead of dye absorbance.

    Each lot's wells are made from the protein the absorbance night found for that lot, so both
    nights must give every lot the same protein and the same disposition.
    """
    from flows import nightly
    from pipeline.night.open import open_night
    from pipeline.records.store import Store
    from pipeline.records.workspace import open_workspace

    def night(root: Path, files: dict[str, bytes], fluorescence: bool) -> dict[str, tuple[str, float | None]]:
        write_settings(root, {"plant_name": demo.PLANT_NAME, "time_zone": demo.PLANT_TIME_ZONE,
                              "signing": {"signer_name": demo.DEMO_SIGNER},
                              **({"controlled": {"specifications": "plant-specs", "methods": "plant-methods"}}
                                 if fluorescence else {})})
        (root / "keys").mkdir(parents=True, exist_ok=True)
        (root / "keys" / "use-demo-identity").touch()
        for name, data in files.items():
            atomic_write(root / "inbox" / name, data)
        ws, store, signer = open_night(root)
        summary = nightly.run_stages(ws, store, signer, orchestrated=False)
        store = Store(open_workspace(root).database_url)
        protein = {d.lot_id: next(r.value for r in d.record.results if r.code == "protein") for d in store.decisions()}
        return {o.lot_id: (o.label, protein.get(o.lot_id)) for o in summary.outcomes}

    first = demo.build_scenario()[0].files
    absorbance = night(tmp_path / "absorbance", first, fluorescence=False)
    files = dict(first)
    (map_name,) = [n for n in files if n.startswith("platemap-PR-")]
    (read_name,) = [n for n in files if n.startswith("protread-PR-")]
    plate_map = pd.read_csv(io.BytesIO(files[map_name]), dtype={"lot_id": str})
    files[map_name] = files[map_name].replace(b"PROT-DYE595", b"PROT-FL485")
    del files[read_name]
    wells = plate_map[plate_map["role"] != "empty"]
    in_well = [row.nominal_mg_per_ml if row.role == "standard" else absorbance[row.lot_id][1] / row.dilution_factor
               for row in wells.itertuples()]
    read = pd.DataFrame({"plate_id": wells["plate_id"], "well": wells["well"],
                         "intensity_rfu": [round(float(rfu(x)), 4) for x in in_well],
                         "excitation_nm": 485, "emission_nm": 590})
    files[read_name.replace("protread-", "fluoread-")] = read.to_csv(index=False, lineterminator="\n").encode()
    plant = tmp_path / "fluorescence" / "plant-specs"
    shutil.copytree(REPO / "specs" / "products", plant)
    for spec in plant.glob("*.yaml"):
        spec.write_text(spec.read_text(encoding="utf-8").replace("protein_method: PROT-DYE595",
                                                                 "protein_method: PROT-FL485"), encoding="utf-8")
    # The shipped fluorescence method takes effect after the demo's first night: the plant's own copy
    # (a version in force on the night's assay date) is used here.
    methods = tmp_path / "fluorescence" / "plant-methods"
    shutil.copytree(REPO / "specs" / "methods", methods)
    text = (methods / "PROT-FL485.yaml").read_text(encoding="utf-8")
    (methods / "PROT-FL485.yaml").write_text(text.replace("effective_from: 2026-12-01", "effective_from: 2026-01-15"),
                                             encoding="utf-8")
    fluorescence = night(tmp_path / "fluorescence", files, fluorescence=True)

    assert sorted(fluorescence) == sorted(absorbance) and len(absorbance) == 13
    for lot, (label, protein) in absorbance.items():
        assert fluorescence[lot][0] == label, (lot, fluorescence[lot])
        assert fluorescence[lot][1] == pytest.approx(protein, rel=1e-5), lot
