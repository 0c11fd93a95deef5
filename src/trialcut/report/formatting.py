"""How numbers are shown: one set of rules for the HTML, the PDF and any plain text.

The rules (common practice in trial reporting), with the decimals taken from the plan's
report settings and the endpoint's recorded precision:

- means, estimates, differences and confidence limits: the raw precision plus ``mean_extra``;
- standard deviations, standard errors, variances and covariances: raw plus ``sd_extra``;
- p-values: ``p_value`` decimals, and anything below the smallest shown value as "<0.001";
- counts as integers, percentages to one decimal, degrees of freedom to one decimal,
  test statistics and correlations to ``STATISTIC_DECIMALS``, fit criteria to two.

Rounding is half away from zero on the decimal value JSON stored (``repr`` of the float),
so 0.25 shown to one decimal is 0.3, as a reader rounding by hand would expect; binary
floating-point rounding would give 0.2.  CSV files keep full precision instead.
"""
from __future__ import annotations

import math
import re
from dataclasses import dataclass
from decimal import ROUND_HALF_UP, Context, Decimal
from typing import Any, Mapping

STATISTIC_DECIMALS = 2
CORRELATION_DECIMALS = 3
CRITERION_DECIMALS = 2
MISSING_TEXT = "–"   # en dash: a cell with no value
_WIDE = Context(prec=340, rounding=ROUND_HALF_UP)


def round_half_away(value: float, decimals: int) -> str:
    """``value`` rounded to ``decimals`` places, as text without a spurious "-0"."""
    quantum = Decimal(1).scaleb(-decimals)
    # The default context keeps 28 digits, so quantize fails from about 1e26 on; a double
    # has at most 309 digits before the point.
    rounded = Decimal(repr(float(value))).quantize(quantum, context=_WIDE)
    if rounded == 0:
        rounded = abs(rounded)
    return f"{rounded:.{decimals}f}"


@dataclass(frozen=True)
class NumberFormat:
    """The decimals of one endpoint's tables (``raw`` is the endpoint's recorded precision)."""

    raw: int = 1
    mean_extra: int = 1
    sd_extra: int = 2
    p_value: int = 3

    @classmethod
    def from_results(cls, results: Mapping[str, Any], raw: int | None = None) -> "NumberFormat":
        settings = ((results.get("plan") or {}).get("report") or {}).get("decimals") or {}
        return cls(
            raw=1 if raw is None else int(raw),
            mean_extra=int(settings.get("mean_extra", 1)),
            sd_extra=int(settings.get("sd_extra", 2)),
            p_value=int(settings.get("p_value", 3)),
        )

    @property
    def mean_decimals(self) -> int:
        return self.raw + self.mean_extra

    @property
    def sd_decimals(self) -> int:
        return self.raw + self.sd_extra

    def decimals_for(self, kind: str) -> int | None:
        return {
            "mean": self.mean_decimals, "shift": self.mean_decimals, "sd": self.sd_decimals,
            "df": 1, "statistic": STATISTIC_DECIMALS, "correlation": CORRELATION_DECIMALS,
            "percent": 1, "share": 1, "criterion": CRITERION_DECIMALS, "count": 0,
            "p": self.p_value,
            # Group-sequential tables: the same places as the sentence above them (|z| ≥ 2.790, p ≤ 0.00526).
            "boundary_z": BOUNDARY_Z_DECIMALS, "fraction": FRACTION_DECIMALS, "alpha": ALPHA_DECIMALS,
            "boundary_p": BOUNDARY_P_DECIMALS,
            # Proportions, rates and their differences or ratios (binary and count endpoints).
            "proportion": PROPORTION_DECIMALS,
        }.get(kind)

    def p_value_text(self, value: float) -> str:
        smallest = Decimal(1).scaleb(-self.p_value)
        if Decimal(repr(float(value))) < smallest:
            return f"<{smallest:.{self.p_value}f}"
        return round_half_away(value, self.p_value)

    def cell(self, value: Any, kind: str) -> str:
        """The text of one table cell."""
        if value is None or (isinstance(value, float) and math.isnan(value)):
            return MISSING_TEXT
        if kind == "flag" or isinstance(value, bool):
            return "yes" if value else "no"
        if kind == "term":
            return term_text(str(value))
        if kind == "text" or not isinstance(value, (int, float)):
            return str(value)
        if kind == "p":
            return self.p_value_text(value)
        if kind == "coefficient":
            return coefficient_text(float(value), self.mean_decimals)
        if kind == "p_exact":     # p-values whose order matters (multiplicity): never "<0.001"
            return p_exact_text(float(value), self.p_value)
        if kind == "share":       # a proportion shown as a percentage
            return round_half_away(100.0 * value, 1)
        if kind == "count" and float(value).is_integer():
            return str(int(value))
        decimals = self.decimals_for(kind)
        if decimals is None:
            return _general(value)
        return round_half_away(value, decimals)

    def interval(self, lower: Any, upper: Any, kind: str = "mean") -> str:
        """A confidence interval as "(lower, upper)"."""
        return f"({self.cell(lower, kind)}, {self.cell(upper, kind)})"


TERM_WORDS = {"arm": "Arm", "visit": "Visit", "arm_by_visit": "Arm by visit", "intercept": "Intercept",
              "(Intercept)": "Intercept"}
# One part of a coefficient name in formula style, e.g. "arm[Lorvatide 10 mg]".
_LEVELLED = re.compile(r"^\s*(?P<name>[^\[\]]+?)\s*\[(?P<level>[^\]]*)\]\s*$")


def term_text(term: str) -> str:
    """A model term or coefficient in words, whatever naming the statistics layer used.

    'BASE_by_visit' reads 'BASE by visit'; formula-style coefficient names never reach the
    reader: 'arm[Lorvatide 10 mg]:visit[Week 4]' reads 'Arm by visit: Lorvatide 10 mg, Week 4'
    and 'STRAT1R[Severe]' reads 'STRAT1R: Severe'.
    """
    term = str(term)
    if term in TERM_WORDS:
        return TERM_WORDS[term]
    if "[" not in term:
        plain = term[: -len("_by_visit")] + " by visit" if term.endswith("_by_visit") else term
        # "BASE:visit" is formula syntax; "STRAT1R: Severe vs Mild" is already words.
        return _first_upper(plain.replace(":", " by ") if " " not in plain else plain)
    names, levels = [], []
    for part in term.split(":"):
        match = _LEVELLED.match(part)
        names.append(TERM_WORDS.get(match["name"], match["name"]).lower() if match and match["name"] in TERM_WORDS
                     else (match["name"] if match else part.strip()))
        if match:
            levels.append(match["level"])
    return _first_upper(" by ".join(names)) + (": " + ", ".join(levels) if levels else "")


def _first_upper(text: str) -> str:
    """Capitalise a lower-case first word only ('arm' -> 'Arm'; a column name such as 'BASE' stays)."""
    return text[:1].upper() + text[1:] if text[:1].islower() else text


def coefficient_text(value: float, least_decimals: int) -> str:
    """A model coefficient: three significant digits, never fewer decimals than a mean has.

    A slope per unit of a covariate (-0.163 per point of baseline) would read -0.2 if it were
    rounded like a mean.
    """
    if value == 0 or not math.isfinite(value):
        return round_half_away(value, least_decimals) if math.isfinite(value) else str(value)
    digits = 3 - 1 - math.floor(math.log10(abs(value)))
    return round_half_away(value, max(least_decimals, digits))


def _general(value: float) -> str:
    """A number of unknown meaning: up to four significant decimals, no exponent if avoidable."""
    if isinstance(value, int) or float(value).is_integer():
        return str(int(value))
    if abs(value) >= 1e-3:
        return f"{value:.4g}" if abs(value) < 1e6 else f"{value:.6g}"
    return f"{value:.3g}"


BOUNDARY_Z_DECIMALS = FRACTION_DECIMALS = ALPHA_DECIMALS = 3
BOUNDARY_P_DECIMALS = 5
PROPORTION_DECIMALS = 3


def describe_rules(number_format: NumberFormat, *, what: str = "", recorded: Any = None) -> str:
    """The rules in words, as the tables of ``what`` apply them, so a reader knows how values were rounded.

    ``recorded`` is the endpoint's ``decimals`` as the plan gives it; the sentence names the
    plan's report settings (``decimals``: mean_extra, sd_extra, p_value) that set the rest.
    """
    smallest = f"<{Decimal(1).scaleb(-number_format.p_value):.{number_format.p_value}f}"
    subject = f"In the tables of {what}, m" if what else "M"
    recorded_text = (f"the values are recorded to {number_format.raw} decimal{'s' if number_format.raw != 1 else ''}"
                     + (" (the plan's decimals for this endpoint)" if recorded is not None else ""))
    return (
        f"{subject}eans, medians, estimated differences and confidence limits are shown to "
        f"{_decimals_words(number_format.mean_decimals)} and standard deviations and standard errors to "
        f"{_decimals_words(number_format.sd_decimals)}: {recorded_text}, plus {number_format.mean_extra} and "
        f"{number_format.sd_extra} (the plan's report decimals mean_extra and sd_extra). p-values are shown to "
        f"{_decimals_words(number_format.p_value)} (p_value), with smaller values shown as {smallest}, except in "
        f"the multiplicity table, where small p-values keep three significant digits so their order shows "
        f"(group-sequential boundaries: |z| and information fractions to {BOUNDARY_Z_DECIMALS} decimals, the "
        f"alpha a hypothesis holds to {ALPHA_DECIMALS}, boundary p-values and alpha spent to {BOUNDARY_P_DECIMALS}). "
        "Degrees of freedom and percentages are shown to 1 decimal, test statistics to 2, correlations to 3; "
        "model coefficients (including slopes of numeric covariates) to three significant digits; "
        f"proportions, rates and their differences or ratios (binary and count endpoints) to {PROPORTION_DECIMALS}. "
        "Values are rounded half away from zero. The CSV files keep full precision."
    )


def _decimals_words(count: int) -> str:
    return f"{count} decimal{'s' if count != 1 else ''}"


def p_exact_text(value: float, decimals: int) -> str:
    """A p-value whose order matters: ``decimals`` places, and three significant digits below that."""
    if value <= 0:
        return f"<{Decimal(1).scaleb(-300)}"
    if value >= 10 ** -decimals:
        return round_half_away(value, decimals)
    mantissa, exponent = f"{value:.2e}".split("e")
    return f"{mantissa} × 10{str(int(exponent)).translate(SUPERSCRIPTS)}"


SUPERSCRIPTS = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def short_hash(value: str | None, length: int = 12) -> str:
    return (value or "")[:length] or "not recorded"
