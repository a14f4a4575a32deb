"""The words lotgate decides with: dispositions, hold categories, verdicts."""

RELEASED = "released"
HELD = "held"

# Hold categories, in the order a reviewer should read them (docs/assay-rules.md, "Verdicts and disposition").
OUT_OF_SPECIFICATION = "out of specification"
INVALID_ASSAY = "invalid assay"
INCOMPLETE = "incomplete"
OUT_OF_TREND = "out of trend"
REVIEW_REQUIRED = "review required"  # an earlier hold or a person's decision stands
HOLD_ORDER = (OUT_OF_SPECIFICATION, INVALID_ASSAY, INCOMPLETE, OUT_OF_TREND, REVIEW_REQUIRED)

# Verdicts of one attribute.
PASS = "pass"
FAIL = "fail"
INVALID = "invalid"
MISSING = "missing"
REPORTED = "reported"  # reported without a limit
