"""The demo scenario: an invented plant's exports over several nights (deterministic).

Tarnwick Bioprocess, Plant 2, is invented, and so are its two products, its lots, analysts and
numbers. Reads are simulated from first principles: progress curves from the integrated
Michaelis–Menten equation (Lambert W form) with read noise and spontaneous substrate hydrolysis,
a reference standard and substrate blanks on each plate, a BSA standard curve on the protein
plate, seven substrate levels per lot for the kinetic constants, and LIMS results.

On purpose the fourth night holds: two lots out of specification (low specific activity), one
plate whose reference standard fails (its lots: invalid assay), one lot still awaiting its lead
result (pending), one malformed LIMS export (quarantined, so its lot is incomplete), one lot out
of trend, and the rest released. Earlier nights give the trend stage its baseline. Across the
nights the lot record shows itself: two lots of the third night await their microbiology
(pending) until it arrives on the fourth night (released); a protease lot of the first night
never gets its microbiology (pending, then held overdue on the fifth night, when its lead result
arrives from the contract lab); after the fourth night an authorised person records an
investigation of one OOS lot ("assignable laboratory cause: result invalidated",
``Night.investigations``); on the fifth night the invalid plate's lots get their activity plate
repeated alone, their protein standing on record from the fourth night (released),
and both OOS lots are retested within specification: the investigated one is released, the
other stays held (no testing into compliance).

``build_scenario`` is pure: it returns file names and bytes; the command line writes them.
"""

from __future__ import annotations

import csv
import datetime as dt
import io
from dataclasses import dataclass, replace

import numpy as np
from scipy.special import lambertw

PLANT_NAME = "Tarnwick Bioprocess, Plant 2 (demo)"
PLANT_TIME_ZONE = "Europe/Berlin"
DEMO_SIGNER = "Mira Castellan"
DEMO_SEED = 20261124

READ_TIMES_S = np.arange(0, 601, 30, dtype=float)  # 21 reads, 10 min
BSA_STANDARDS_MG_PER_ML = (0.0, 0.125, 0.25, 0.5, 0.75, 1.0, 1.5)
ROWS_96 = "ABCDEFGH"
PROTEIN_LOTS_PER_PLATE = 27  # 14 standard wells + 27 lots × 3 replicates = 95 of 96 wells
PLATE_MAP_HEADER = ["plate_id", "plate_format", "method_id", "well", "role", "lot_id",
                    "substrate_mm", "dilution_factor", "nominal_mg_per_ml"]
REGISTRY_HEADER = ["lot_id", "product_code", "manufactured_on", "assay_date", "analyst"]


@dataclass(frozen=True)
class ProductModel:
    """How the invented product behaves, for simulation only."""

    code: str
    lot_prefix: str
    method_id: str
    wavelength_nm: int
    temperature_c: float
    epsilon_path: float  # ε·l in AU per mM
    volume_ratio: float  # V_sample / V_reaction
    assay_substrate_mm: float
    kinetic_levels_mm: tuple[float, ...]
    vmax_u_per_mg: float
    vmax_sd: float
    km_mm: float
    km_sd: float
    protein_mg_per_ml: float
    protein_sd: float
    activity_dilution: float
    protein_dilution: float
    reference_lot: str
    reference_u_per_ml: float
    blank_au_per_min_per_mm: float
    lims_tests: tuple[str, ...]


LIPASE = ProductModel(
    code="LLC-200", lot_prefix="LLC", method_id="LIP-PNPB", wavelength_nm=405, temperature_c=30.0,
    epsilon_path=18.0 * 0.55, volume_ratio=0.020 / 0.200, assay_substrate_mm=2.0,
    kinetic_levels_mm=(0.08, 0.15, 0.30, 0.50, 0.80, 1.20, 2.00),
    vmax_u_per_mg=246.0, vmax_sd=6.0, km_mm=0.40, km_sd=0.015,
    protein_mg_per_ml=6.0, protein_sd=0.2, activity_dilution=10000.0, protein_dilution=8.0,
    reference_lot="REF-LIP-A", reference_u_per_ml=1200.0, blank_au_per_min_per_mm=0.0009,
    lims_tests=("PH", "PB", "COLI", "ECOLI", "SALM"),
)
PROTEASE = ProductModel(
    code="PGR-040", lot_prefix="PGR", method_id="PRT-SAAPF", wavelength_nm=410, temperature_c=37.0,
    epsilon_path=8.8 * 0.55, volume_ratio=0.020 / 0.200, assay_substrate_mm=3.0,
    kinetic_levels_mm=(0.16, 0.30, 0.60, 1.00, 1.60, 2.50, 4.00),
    vmax_u_per_mg=66.0, vmax_sd=1.8, km_mm=0.80, km_sd=0.03,
    protein_mg_per_ml=2.2, protein_sd=0.08, activity_dilution=500.0, protein_dilution=2.0,
    reference_lot="REF-PRT-B", reference_u_per_ml=110.0, blank_au_per_min_per_mm=0.0012,
    lims_tests=("DM", "PB", "COLI", "ECOLI", "SALM"),
)


@dataclass(frozen=True)
class LotPlan:
    lot_id: str
    product: ProductModel
    manufactured_on: dt.date
    vmax_u_per_mg: float
    km_mm: float
    protein_mg_per_ml: float
    intended: str  # the disposition the scenario intends, for the end-to-end test
    missing_tests: tuple[str, ...] = ()
    malformed_lims: bool = False


@dataclass(frozen=True)
class DemoInvestigation:
    """An investigation outcome the demo records, with the demo identity, after its night."""

    lot_id: str
    test: str
    outcome: str  # "invalidated" or "confirmed"
    reference: str
    reason: str
    retest_plan: str


@dataclass(frozen=True)
class Night:
    assay_date: dt.date
    files: dict[str, bytes]
    lots: tuple[LotPlan, ...]
    investigations: tuple[DemoInvestigation, ...] = ()


def _csv(header: list[str], rows: list[list[object]]) -> bytes:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    writer.writerows(rows)
    return buffer.getvalue().encode("utf-8")


def _fmt(value: float | None, digits: int) -> str:
    return "" if value is None else f"{value:.{digits}f}"


def progress_curve_au(
    time_s: np.ndarray, substrate_mm: float, vmax_mm_per_min: float, km_mm: float, epsilon_path: float
) -> np.ndarray:
    """Absorbance change from product formed, integrated Michaelis–Menten (no noise).

    S(t) = Km·W((S0/Km)·exp((S0 − Vmax·t)/Km)),  P = S0 − S,  ΔA = ε·l·P.
    """
    t_min = time_s / 60.0
    if vmax_mm_per_min <= 0 or substrate_mm <= 0:
        return np.zeros_like(t_min)
    arg = (substrate_mm / km_mm) * np.exp((substrate_mm - vmax_mm_per_min * t_min) / km_mm)
    s_t = km_mm * np.real(lambertw(arg))
    return epsilon_path * (substrate_mm - s_t)


def _well_names(count: int) -> list[str]:
    return [f"{ROWS_96[i // 12]}{i % 12 + 1:02d}" for i in range(count)]


class _Plate:
    """Accumulates the plate map and reads of one simulated activity plate."""

    def __init__(self, plate_id: str, product: ProductModel, rng: np.random.Generator):
        self.plate_id, self.product, self.rng = plate_id, product, rng
        self.wells = iter(_well_names(96))
        self.map_rows: list[list[object]] = []
        self.read_rows: list[list[object]] = []

    def add(self, role: str, lot_id: str | None, substrate_mm: float | None, dilution: float,
            vmax_mm_per_min: float, km_mm: float) -> None:
        well = next(self.wells)
        p = self.product
        self.map_rows.append([self.plate_id, 96, p.method_id, well, role, lot_id or "",
                              _fmt(substrate_mm, 3), _fmt(dilution, 1), ""])
        s0 = substrate_mm or 0.0
        pipetting = self.rng.normal(1.0, 0.015)
        signal = progress_curve_au(READ_TIMES_S, s0, vmax_mm_per_min * pipetting, km_mm, p.epsilon_path)
        blank = p.blank_au_per_min_per_mm * s0 * READ_TIMES_S / 60.0
        a0 = 0.060 + 0.004 * s0 + self.rng.normal(0, 0.002)
        absorbance = a0 + signal + blank + self.rng.normal(0, 0.0025, READ_TIMES_S.size)
        for t, a in zip(READ_TIMES_S, absorbance, strict=True):
            self.read_rows.append([self.plate_id, well, f"{t:.0f}", f"{a:.4f}", p.wavelength_nm,
                                   f"{p.temperature_c:.1f}"])

    def files(self, stamp: str) -> dict[str, bytes]:
        read_header = ["plate_id", "well", "time_s", "absorbance", "wavelength_nm", "temperature_c"]
        return {
            f"platemap-{self.plate_id}.csv": _csv(PLATE_MAP_HEADER, self.map_rows),
            f"kinread-{self.plate_id}-{stamp}.csv": _csv(read_header, self.read_rows),
        }


def _vmax_well_mm_per_min(product: ProductModel, vmax_u_per_mg: float, protein: float, dilution: float) -> float:
    """Vmax in the well: U/mg × mg/mL of lot ÷ dilution × V_sample/V_reaction = mM/min."""
    return vmax_u_per_mg * protein / dilution * product.volume_ratio


def _activity_plate(plate_id: str, product: ProductModel, lots: list[LotPlan], rng: np.random.Generator,
                    reference_recovery: float) -> dict[str, bytes]:
    plate = _Plate(plate_id, product, rng)
    s_assay = product.assay_substrate_mm
    # Reference standard: an in-house lot whose activity at the assay substrate is assigned.
    ref_vmax_well = (product.reference_u_per_ml * reference_recovery / product.activity_dilution
                     * product.volume_ratio * (product.km_mm + s_assay) / s_assay)
    for _ in range(3):
        plate.add("reference", product.reference_lot, s_assay, product.activity_dilution, ref_vmax_well, product.km_mm)
    for _ in range(3):
        plate.add("blank", None, s_assay, 1.0, 0.0, product.km_mm)
    for level in product.kinetic_levels_mm:
        plate.add("blank", None, level, 1.0, 0.0, product.km_mm)
    for lot in lots:
        vmax_well = _vmax_well_mm_per_min(product, lot.vmax_u_per_mg, lot.protein_mg_per_ml, product.activity_dilution)
        for _ in range(3):
            plate.add("sample", lot.lot_id, s_assay, product.activity_dilution, vmax_well, lot.km_mm)
        for level in product.kinetic_levels_mm:
            for _ in range(2):
                plate.add("kinetic", lot.lot_id, level, product.activity_dilution, vmax_well, lot.km_mm)
    return plate.files("R1")


def _protein_plate(plate_id: str, lots: list[LotPlan], rng: np.random.Generator) -> dict[str, bytes]:
    wells = iter(_well_names(96))
    map_rows: list[list[object]] = []
    read_rows: list[list[object]] = []

    def absorbance(conc: float) -> float:
        return 0.055 + 0.95 * conc - 0.20 * conc**2 + rng.normal(0, 0.006)

    for nominal in BSA_STANDARDS_MG_PER_ML:
        for _ in range(2):
            well = next(wells)
            map_rows.append([plate_id, 96, "PROT-DYE595", well, "standard", "", "", "1.0", f"{nominal:.3f}"])
            read_rows.append([plate_id, well, f"{absorbance(nominal):.4f}", 595])
    for lot in lots:
        in_well = lot.protein_mg_per_ml / lot.product.protein_dilution
        for _ in range(3):
            well = next(wells)
            map_rows.append([plate_id, 96, "PROT-DYE595", well, "sample", lot.lot_id, "",
                             _fmt(lot.product.protein_dilution, 1), ""])
            read_rows.append([plate_id, well, f"{absorbance(in_well * rng.normal(1.0, 0.01)):.4f}", 595])
    return {
        f"platemap-{plate_id}.csv": _csv(PLATE_MAP_HEADER, map_rows),
        f"protread-{plate_id}-R1.csv": _csv(["plate_id", "well", "absorbance", "wavelength_nm"], read_rows),
    }


def _lims_file(lot: LotPlan, assay_date: dt.date, rng: np.random.Generator,
               only: tuple[str, ...] | None = None) -> tuple[str, bytes]:
    rows: list[list[object]] = []
    for test in lot.product.lims_tests:
        if test in lot.missing_tests if only is None else test not in only:
            continue
        if test == "PH":
            value, unit = f"{rng.normal(7.0, 0.08):.2f}", ""
        elif test == "DM":
            value, unit = f"{rng.normal(95.0, 0.6):.1f}", "%"
            if lot.malformed_lims:
                value = value.replace(".", ",")  # a decimal comma typed into the LIMS
        elif test == "PB":
            value, unit = ("<0.5" if rng.random() < 0.6 else f"{rng.uniform(0.5, 1.5):.1f}"), "mg/kg"
        elif test == "COLI":
            value, unit = f"{int(rng.integers(0, 10))}", "CFU/g"
        else:
            value, unit = "absent", "per 25 g"
        rows.append([lot.lot_id, test, value, unit, assay_date.isoformat(), "K. Lindqvist"])
    return f"lims-{lot.lot_id}.csv", _csv(["lot_id", "test_code", "result", "unit", "tested_on", "analyst"], rows)


def _plan_lots(product: ProductModel, night_index: int, date: dt.date, count: int,
               rng: np.random.Generator) -> list[LotPlan]:
    lots = []
    for k in range(count):
        serial = night_index * count + k + 1
        lots.append(LotPlan(
            lot_id=f"{product.lot_prefix}-{date:%y%m}-{serial:03d}",
            product=product,
            manufactured_on=date - dt.timedelta(days=2),
            vmax_u_per_mg=float(rng.normal(product.vmax_u_per_mg, product.vmax_sd)),
            km_mm=float(rng.normal(product.km_mm, product.km_sd)),
            protein_mg_per_ml=float(rng.normal(product.protein_mg_per_ml, product.protein_sd)),
            intended="released",
        ))
    return lots


def _registry(lots: list[LotPlan], assay_date: dt.date) -> bytes:
    return _csv(REGISTRY_HEADER, [[lot.lot_id, lot.product.code, lot.manufactured_on.isoformat(),
                                   assay_date.isoformat(), "J. Ferro"] for lot in lots])


MICRO = ("COLI", "ECOLI", "SALM")


def build_scenario(seed: int = DEMO_SEED, first_night: dt.date = dt.date(2026, 11, 24),
                   nights: int = 5, lipase_per_night: int = 8, protease_per_night: int = 5) -> list[Night]:
    """Every night's exports. With five nights or more (the full demo) the next-to-last night carries
    the deliberate problems and the last one their follow-ups; with fewer, the last night carries them."""
    rng = np.random.default_rng(seed)
    full = nights >= 5 and lipase_per_night >= 8 and protease_per_night >= 4
    trouble = nights - 2 if full else nights - 1
    result: list[Night] = []
    for n in range(nights - 1 if full else nights):
        date = first_night + dt.timedelta(days=n)
        lipase = _plan_lots(LIPASE, n, date, lipase_per_night, rng)
        protease = _plan_lots(PROTEASE, n, date, protease_per_night, rng)
        recoveries = {1: 1.0, 2: 1.0}
        followups: list[tuple[LotPlan, tuple[str, ...]]] = []
        investigations: tuple[DemoInvestigation, ...] = ()
        if full and n == 0:
            protease[0] = replace(protease[0], missing_tests=("PB", *MICRO), intended="pending")
        if full and n == 2:
            for i in (6, 7):  # after the lots that complete the charts' baseline
                lipase[i] = replace(lipase[i], missing_tests=MICRO, intended="pending")
        if n == trouble and lipase_per_night >= 8 and protease_per_night >= 4:
            lipase[1] = replace(lipase[1], missing_tests=("PB",), intended="pending" if full else "held: incomplete")
            lipase[2] = replace(lipase[2], vmax_u_per_mg=LIPASE.vmax_u_per_mg * 0.865, intended="held: out of trend")
            for i in range(4, 8):
                lipase[i] = replace(lipase[i], intended="held: invalid assay")
            recoveries[2] = 0.82
            protease[1] = replace(protease[1], vmax_u_per_mg=PROTEASE.vmax_u_per_mg * 0.66,
                                  intended="held: out of specification")
            protease[3] = replace(protease[3], malformed_lims=True, intended="held: incomplete")
            if full:
                protease[2] = replace(protease[2], vmax_u_per_mg=PROTEASE.vmax_u_per_mg * 0.64,
                                      intended="held: out of specification")
                followups = [(replace(lot, intended="released"), MICRO) for lot in result[2].lots
                             if lot.intended == "pending"]
                investigations = (DemoInvestigation(
                    protease[2].lot_id, "specific_activity", "invalidated", "INV-2026-031",
                    "substrate stock prepared at half strength on plate AK-" + f"{date:%y%m%d}" + "-P1 (preparation "
                    "record); the other lots of the plate were within trend", "re-assay activity and protein on "
                    "fresh plates with newly prepared substrate"),)
        registry_lots = [*lipase, *protease, *(lot for lot, _ in followups)]
        files = {f"lots-{date:%Y%m%d}.csv": _registry(registry_lots, date)}
        for product, lots, tag in ((LIPASE, lipase, "L"), (PROTEASE, protease, "P")):
            for plate_no, start in enumerate(range(0, len(lots), 4), start=1):
                plate_id = f"AK-{date:%y%m%d}-{tag}{plate_no}"
                recovery = recoveries.get(plate_no, 1.0) if tag == "L" else 1.0
                files.update(_activity_plate(plate_id, product, lots[start:start + 4], rng, recovery))
        everyone = [*lipase, *protease]
        for plate_no, start in enumerate(range(0, len(everyone), PROTEIN_LOTS_PER_PLATE), start=1):
            files.update(_protein_plate(f"PR-{date:%y%m%d}-{plate_no}", everyone[start:start + PROTEIN_LOTS_PER_PLATE], rng))
        for lot in (*lipase, *protease):
            name, data = _lims_file(lot, date, rng)
            files[name] = data
        for lot, tests in followups:
            name, data = _lims_file(lot, date, rng, only=tests)
            files[name.replace(".csv", f"-{date:%Y%m%d}.csv")] = data
        result.append(Night(assay_date=date, files=files, lots=(*lipase, *protease, *(lot for lot, _ in followups)),
                            investigations=investigations))
    if full:
        result.append(_follow_up_night(result, first_night + dt.timedelta(days=nights - 1), seed))
    return result


def _follow_up_night(earlier: list[Night], date: dt.date, seed: int) -> Night:
    """The last night of the full demo: the invalid plate's lots on a new activity plate (their protein is on
    record), the OOS lots retested on both plates, and
    the first night's pending protease lot getting its lead result only (its microbiology is overdue)."""
    # A stream of its own, chosen so that the re-assayed lots' read noise keeps them in trend: with
    # some other streams their Km continues a run below the chart's centre (a genuine Nelson rule 2
    # signal of the simulation), which would hide what this night is meant to show.
    rng = np.random.default_rng(seed + 8)
    trouble = earlier[-1].lots
    reassayed = [replace(lot, intended="released") for lot in trouble if lot.intended == "held: invalid assay"]
    oos = [lot for lot in trouble if lot.intended == "held: out of specification"]
    investigated = {i.lot_id for i in earlier[-1].investigations}
    retested = [replace(lot, vmax_u_per_mg=PROTEASE.vmax_u_per_mg,
                        intended="released" if lot.lot_id in investigated else "held: out of specification")
                for lot in oos]
    overdue = replace(earlier[0].lots[next(i for i, lot in enumerate(earlier[0].lots) if lot.intended == "pending")],
                      intended="held: overdue")
    files = {f"lots-{date:%Y%m%d}.csv": _registry([*reassayed, *retested, overdue], date)}
    for product, mine, tag in ((LIPASE, reassayed, "L"), (PROTEASE, retested, "P")):
        for plate_no, start in enumerate(range(0, len(mine), 4), start=1):
            files.update(_activity_plate(f"AK-{date:%y%m%d}-R{tag}{plate_no}", product, mine[start:start + 4], rng, 1.0))
    # The lab repeats only the assay that failed: the invalid plate's lots get a new activity plate, and
    # their protein (valid on the fourth night) stands on record; the retested OOS lots get both again.
    files.update(_protein_plate(f"PR-{date:%y%m%d}-R1", [*retested], rng))
    name, data = _lims_file(overdue, date, rng, only=("PB",))
    files[name.replace(".csv", f"-{date:%Y%m%d}.csv")] = data
    return Night(assay_date=date, files=files, lots=(*reassayed, *retested, overdue))


def build_reassay(night: Night, lot_ids: tuple[str, ...], assay_date: dt.date, seed: int = DEMO_SEED + 1) -> Night:
    """A corrected, complete re-export for some lots of an earlier night: new plates, new LIMS files.

    Models a re-assay after an invalid plate: the same lots (same true values), assayed again on
    fresh activity and protein plates whose reference standard recovers normally.
    """
    rng = np.random.default_rng(seed)
    lots = [lot for lot in night.lots if lot.lot_id in lot_ids]
    files = {f"lots-{assay_date:%Y%m%d}-reassay.csv": _registry(lots, assay_date)}
    for product, tag in ((LIPASE, "L"), (PROTEASE, "P")):
        mine = [lot for lot in lots if lot.product is product]
        for plate_no, start in enumerate(range(0, len(mine), 4), start=1):
            files.update(_activity_plate(f"AK-{assay_date:%y%m%d}-R{tag}{plate_no}", product, mine[start:start + 4],
                                         rng, 1.0))
    files.update(_protein_plate(f"PR-{assay_date:%y%m%d}-R1", lots, rng))
    for lot in lots:
        name, data = _lims_file(lot, assay_date, rng)
        files[name.replace(".csv", f"-{assay_date:%Y%m%d}.csv")] = data
    return Night(assay_date=assay_date, files=files, lots=tuple(lots))
