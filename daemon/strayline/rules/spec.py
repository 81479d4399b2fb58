"""Rule specifications: the pydantic models behind ``config/rules.yaml``.

Every rule has a name, a kind, a severity, a persistence (lines in a row with the raise
condition before it fires) and a hysteresis (separate clear thresholds, and lines in a row
with the clear condition before it clears). ``suppressed_by`` names the rules that
*explain* this one: while one of them holds (its raise condition on the line, or it is
active) this rule is not raised, so one fault gives one alert (lost fluorescence also
fails every fit and steps the PL, but only ``fluorescence_lost`` speaks). Thresholds are
relative to the rolling baseline of the scan's previous good lines unless the name says
otherwise; units are in the names.
"""

from __future__ import annotations

import difflib
from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from strayline.rules.metrics import metric_names

__all__ = [
    "RULE_KINDS",
    "AcquisitionStalledSpec",
    "AnyRuleSpec",
    "BaselineSpec",
    "ContrastCollapsedSpec",
    "FitFailuresRisingSpec",
    "FluorescenceLostSpec",
    "ResonanceJumpSpec",
    "RuleSpec",
    "RulesConfig",
    "Severity",
    "ThresholdSpec",
    "ZfsDriftSpec",
]

Severity = Literal["info", "warning", "critical"]
AUX_STATS = ("median", "p10", "p90", "min", "max", "spread")


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", frozen=True)


class RuleSpec(_Model):
    """Fields every rule has (each kind below adds its thresholds)."""

    name: str = Field(pattern=r"^[a-z][a-z0-9_]*$")
    kind: str
    severity: Severity
    enabled: bool = True
    persistence_lines: int = Field(default=1, ge=1, le=1000)
    clear_lines: int = Field(default=3, ge=1, le=10000)
    suppressed_by: tuple[str, ...] = ()
    advice: str = ""


class FluorescenceLostSpec(RuleSpec):
    """PL (line median, or the level from the pixel where it fell) below a fraction of the
    running median. Common practice: 50–70 % of a running median (PHYSICS.md §7)."""

    name: str = Field(default="fluorescence_lost", pattern=r"^[a-z][a-z0-9_]*$")
    kind: Literal["fluorescence_lost"] = "fluorescence_lost"
    severity: Severity = "critical"
    persistence_lines: int = Field(default=1, ge=1, le=1000)
    clear_lines: int = Field(default=2, ge=1, le=10000)
    pl_fraction_below: float = Field(default=0.6, gt=0.0, lt=1.0)
    pl_fraction_clear_above: float = Field(default=0.8, gt=0.0, le=2.0)
    advice: str = (
        "check the tip and the optics (focus, laser power, NV charge state); "
        "consider stopping the scan"
    )

    @model_validator(mode="after")
    def _hysteresis(self) -> FluorescenceLostSpec:
        if self.pl_fraction_clear_above <= self.pl_fraction_below:
            raise ValueError(
                "pl_fraction_clear_above must be greater than pl_fraction_below; found "
                f"{self.pl_fraction_clear_above} <= {self.pl_fraction_below}"
            )
        return self


class ContrastCollapsedSpec(RuleSpec):
    """The line's mean ODMR contrast (undetected dips as 0) below a fraction of its
    running median, by more than its own noise, while PL stays normal.

    ``contrast_z_below``: the evidence must pass this too: the robust z of the line's
    mean contrast against the running median and spread of the same mean over the scan's
    good lines, combined over the run of low lines as Σz/√L (on a weak scan where few dips
    are detected, one line's mean scatters by tens of per cent: a collapse then takes two
    or three lines to tell from that scatter, a strong scan's one).
    """

    name: str = Field(default="contrast_collapsed", pattern=r"^[a-z][a-z0-9_]*$")
    kind: Literal["contrast_collapsed"] = "contrast_collapsed"
    severity: Severity = "warning"
    persistence_lines: int = Field(default=1, ge=1, le=1000)
    clear_lines: int = Field(default=2, ge=1, le=10000)
    suppressed_by: tuple[str, ...] = ("fluorescence_lost",)
    contrast_fraction_below: float = Field(default=0.5, gt=0.0, lt=1.0)
    contrast_fraction_clear_above: float = Field(default=0.75, gt=0.0, le=2.0)
    contrast_z_below: float = Field(default=-14.5, lt=0.0)
    pl_fraction_normal_above: float = Field(default=0.8, gt=0.0, le=2.0)
    advice: str = (
        "PL is normal, so the NV is still there: check the microwave chain (source "
        "output on, amplifier, cable, antenna) and stray light reaching the detector"
    )

    @model_validator(mode="after")
    def _hysteresis(self) -> ContrastCollapsedSpec:
        if self.contrast_fraction_clear_above <= self.contrast_fraction_below:
            raise ValueError(
                "contrast_fraction_clear_above must be greater than "
                f"contrast_fraction_below; found {self.contrast_fraction_clear_above} <= "
                f"{self.contrast_fraction_below}"
            )
        return self


class ResonanceJumpSpec(RuleSpec):
    """A step against the previous line over a pixel range, confirmed on the next line.

    A channel steps when its value passes the absolute threshold AND its robust z against
    the baseline of clean lines passes ``z_above``; the common-mode channel, whose
    narrow steps (a touch over a few pixels) are noisy line to line, instead needs its
    search statistic above ``center_mean_step_t_above``: the two-sample z of the range's
    inverse-variance weighted mean against the rest of the line, each pixel's variance
    being its fits' plus the shift the sample's own field change can give it
    (:func:`strayline.rules.metrics.common_mode_sigma`). Verdicts: PL fell by at least
    ``pl_drop_fraction_for_crash`` → tip crash suspected; the step reverted on a later
    line → sample touched (transient); a common-mode shift alone → contact (strain or
    heating); a roughness change alone → stand-off change.

    Severity: ``severity`` for a step that holds (a crash, a persistent contact: worth
    stopping the scan for, and a stop request when one is configured);
    ``reverted_severity`` for one that had already reverted when it was raised (a touch
    the tip came back from: a note for the morning); ``roughness_only_severity`` for a
    stand-off change seen in the field roughness alone, without a PL drop or a
    common-mode shift (walls coming into view along the fast axis do that too).

    A step that has not reverted stays raised until the scan ends (a crashed tip does not
    mend itself, and the map after it is not comparable with the map before);
    ``clear_when_quiet: true`` clears it instead after ``clear_lines`` lines without a
    new step.

    Confirmation: a channel steps only if its range, measured against the reference of
    the last few lines (``{ch}_step_ref``), shows the same sign and at least
    ``hold_fraction`` of the step (a step that merely undoes an odd previous line does
    not). The line after a step confirms it when, over the same pixels and against the
    reference from before the step (``{ch}_step_held``), a stepped channel still shows
    the same sign and a size between ``hold_fraction`` and ``1 / hold_fraction`` of the
    step (a tip event); or when every stepped channel is back below ``1 − hold_fraction``
    of it, PL or the common mode among them (reverted: a touched sample). Anything else
    (a feature that moved on, a shift that grew or changed sign, a roughness change that
    came and went) is not confirmed and raises nothing. A line that steps back by the
    thresholds to the reference, over pixels where the line before it stepped the other
    way by at least ``hold_fraction`` of that and past the size threshold (and against
    its own reference, so a return from an odd line is no excursion), raises that
    one-line excursion as a touch at once (a common-mode one only if it also passes as a
    pair, below).

    Steadiness: a common-mode step counts only where the common mode was steady before
    it: over the step's pixels, the previous line against the reference of the lines
    before it (``center_mean_step_before``) must not already show the step's sign past
    ``center_mean_before_fraction_below`` of the step. A feature coming into view raises
    (f₋ + f₊)/2 over a few lines, through its transverse field; a touch steps at once.

    Pairs: a touch too weak to step on either of its ends is raised on its return when a
    common-mode step goes back over pixels where one of the last four lines of the same
    direction stepped the other way (credible and steady, each at least
    ``hold_fraction`` of the other and past the size threshold), each statistic at least
    half of ``center_mean_step_t_above`` and (t₁ + t₂)/√2 at least
    ``center_mean_pair_t_above``.
    """

    name: str = Field(default="resonance_jump", pattern=r"^[a-z][a-z0-9_]*$")
    kind: Literal["resonance_jump"] = "resonance_jump"
    severity: Severity = "critical"
    reverted_severity: Severity = "warning"
    roughness_only_severity: Severity = "warning"
    persistence_lines: int = Field(default=2, ge=1, le=1000)
    clear_lines: int = Field(default=20, ge=1, le=10000)
    clear_when_quiet: bool = False
    suppressed_by: tuple[str, ...] = ("fluorescence_lost", "contrast_collapsed")
    field_step_log_ratio_above: float = Field(default=2.1, gt=0.0)
    pl_step_fraction_above: float = Field(default=0.1, gt=0.0, lt=1.0)
    center_mean_step_hz_above: float = Field(default=1.0e6, gt=0.0)
    center_mean_step_t_above: float = Field(default=6.0, gt=0.0)
    z_above: float = Field(default=5.0, gt=0.0)
    pl_drop_fraction_for_crash: float = Field(default=0.1, gt=0.0, lt=1.0)
    hold_fraction: float = Field(default=0.5, gt=0.0, lt=1.0)
    center_mean_before_fraction_below: float = Field(default=0.4, gt=0.0)
    center_mean_pair_t_above: float = Field(default=8.0, gt=0.0)
    advice: str = (
        "check the tip (approach, feedback, topography channel); the map after this "
        "line is not comparable with the map before it; consider stopping the scan"
    )


class FitFailuresRisingSpec(RuleSpec):
    """Fraction of failed fits above an absolute floor and above the baseline.

    ``binomial_z_above``: the rise must also be significant for lines of n pixels:
    ``z = (f − f₀) / √(f₀ (1 − f₀) / n)`` per line (f₀ the running median fraction, floored
    at 1/n; the normal approximation to the binomial count of failures), combined over
    the run of high lines as Σz/√L, above this. On a weak scan where half the fits fail
    anyway, one line of 64 pixels scatters by ±6 %.
    """

    name: str = Field(default="fit_failures_rising", pattern=r"^[a-z][a-z0-9_]*$")
    kind: Literal["fit_failures_rising"] = "fit_failures_rising"
    severity: Severity = "warning"
    persistence_lines: int = Field(default=2, ge=1, le=1000)
    clear_lines: int = Field(default=3, ge=1, le=10000)
    suppressed_by: tuple[str, ...] = ("fluorescence_lost", "contrast_collapsed")
    failure_fraction_above: float = Field(default=0.2, ge=0.0, le=1.0)
    rise_fraction_above: float = Field(default=0.15, ge=0.0, le=1.0)
    binomial_z_above: float = Field(default=21.5, ge=0.0)
    rise_fraction_clear_below: float = Field(default=0.05, ge=0.0, le=1.0)
    advice: str = (
        "check the spectra of the failing pixels: lines merging (field too small), "
        "resonances leaving the frequency window, or falling signal"
    )


class AcquisitionStalledSpec(RuleSpec):
    """No new line for ``interval_factor`` × the usual line interval (clock ticks)."""

    name: str = Field(default="acquisition_stalled", pattern=r"^[a-z][a-z0-9_]*$")
    kind: Literal["acquisition_stalled"] = "acquisition_stalled"
    severity: Severity = "warning"
    interval_factor: float = Field(default=2.5, gt=1.0)
    min_stall_s: float = Field(default=60.0, ge=0.0)
    fallback_interval_s: float | None = Field(default=None, gt=0.0)
    advice: str = (
        "check that the acquisition is still running and can write to the watched "
        "folder (disk space, network share)"
    )


class ZfsDriftSpec(RuleSpec):
    """Low percentile of (f₋ + f₊)/2 drifting from the scan's first good lines.

    The line's 10th percentile of (f₋ + f₊)/2 (``center_mean_p10_hz``) is used because a
    field transverse to the NV axis only raises the mean of the two resonances, by about
    3(γB⊥)²/(2D) (PHYSICS.md §2), so the lowest values track D. The drift must pass both
    ``drift_hz_above`` and ``anchor_spread_factor`` times the spread (1.4826·MAD) of the
    statistic over the anchor lines (what the sample itself does to it). dD/dT =
    −74.2(7) kHz/K near room temperature (Acosta et al., PRL 104, 070801 (2010)), so the
    default 0.37 MHz is about 5 K.
    """

    name: str = Field(default="zfs_drift", pattern=r"^[a-z][a-z0-9_]*$")
    kind: Literal["zfs_drift"] = "zfs_drift"
    severity: Severity = "warning"
    persistence_lines: int = Field(default=6, ge=1, le=1000)
    clear_lines: int = Field(default=3, ge=1, le=10000)
    drift_hz_above: float = Field(default=0.37e6, gt=0.0)
    drift_hz_clear_below: float = Field(default=0.22e6, gt=0.0)
    anchor_spread_factor: float = Field(default=5.0, ge=0.0)
    suppressed_by: tuple[str, ...] = (
        "resonance_jump",
        "fluorescence_lost",
        "contrast_collapsed",
    )
    advice: str = (
        "check the temperature (laser heating, room, cryostat) and the microwave power; "
        "a D drift shifts both resonances together and biases |B| and the angle"
    )

    @model_validator(mode="after")
    def _hysteresis(self) -> ZfsDriftSpec:
        if self.drift_hz_clear_below >= self.drift_hz_above:
            raise ValueError(
                "drift_hz_clear_below must be smaller than drift_hz_above; found "
                f"{self.drift_hz_clear_below} >= {self.drift_hz_above}"
            )
        return self


class ThresholdSpec(RuleSpec):
    """A user threshold on a metric (a LineMetrics field or ``aux.<channel>.<stat>``).

    ``reference``: ``absolute`` (the value), ``baseline_ratio`` (value / baseline median),
    ``baseline_delta`` (value − baseline median) or ``baseline_z`` (robust z). Raises when
    above ``above`` or below ``below``; clears when back under ``clear_above`` / over
    ``clear_below`` (defaults: the raise thresholds).
    """

    kind: Literal["threshold"] = "threshold"
    severity: Severity = "warning"
    metric: str
    reference: Literal["absolute", "baseline_ratio", "baseline_delta", "baseline_z"] = "absolute"
    above: float | None = None
    below: float | None = None
    clear_above: float | None = None
    clear_below: float | None = None
    unit: str = ""

    @field_validator("metric")
    @classmethod
    def _known_metric(cls, value: str) -> str:
        if value.startswith("aux."):
            parts = value.split(".")
            if len(parts) != 3 or not parts[1] or parts[2] not in AUX_STATS:
                raise ValueError(
                    f"metric {value!r} must be 'aux.<channel>.<stat>' with stat one of "
                    f"{', '.join(AUX_STATS)}"
                )
            return value
        names = metric_names()
        if value not in names:
            close = difflib.get_close_matches(value, names, n=1)
            hint = f" (did you mean {close[0]!r}?)" if close else ""
            raise ValueError(
                f"unknown metric {value!r}{hint}; the metrics are {', '.join(names)}, and "
                f"aux.<channel>.<stat> with stat one of {', '.join(AUX_STATS)}"
            )
        return value

    @model_validator(mode="after")
    def _thresholds(self) -> ThresholdSpec:
        if self.above is None and self.below is None:
            raise ValueError("a threshold rule needs 'above' or 'below'; found neither")
        return self


AnyRuleSpec = Annotated[
    FluorescenceLostSpec
    | ContrastCollapsedSpec
    | ResonanceJumpSpec
    | FitFailuresRisingSpec
    | AcquisitionStalledSpec
    | ZfsDriftSpec
    | ThresholdSpec,
    Field(discriminator="kind"),
]

RULE_KINDS = (
    "fluorescence_lost",
    "contrast_collapsed",
    "resonance_jump",
    "fit_failures_rising",
    "acquisition_stalled",
    "zfs_drift",
    "threshold",
)


class BaselineSpec(_Model):
    """The rolling baseline: median and MAD over the last good lines of the scan."""

    window_lines: int = Field(default=30, ge=3, le=10000)
    min_lines: int = Field(default=5, ge=2, le=10000)
    anchor_lines: int = Field(default=10, ge=1, le=10000)

    @model_validator(mode="after")
    def _fits(self) -> BaselineSpec:
        if self.min_lines > self.window_lines:
            raise ValueError(
                f"min_lines must be <= window_lines; found {self.min_lines} > {self.window_lines}"
            )
        return self


class RulesConfig(_Model):
    """The rule set: baseline settings and the list of rules (names unique)."""

    version: Literal[1] = 1
    baseline: BaselineSpec = BaselineSpec()
    rules: list[AnyRuleSpec] = Field(default_factory=list)

    @model_validator(mode="after")
    def _unique(self) -> RulesConfig:
        seen: set[str] = set()
        for rule in self.rules:
            if rule.name in seen:
                raise ValueError(f"rule names must be unique; found {rule.name!r} twice")
            seen.add(rule.name)
        for rule in self.rules:
            if rule.name in rule.suppressed_by:
                raise ValueError(
                    f"rule {rule.name!r}: suppressed_by must name other rules; found itself"
                )
            # A name given by hand must exist (a typo would silently suppress nothing);
            # the built-in defaults may name rules a trimmed rule set leaves out.
            if "suppressed_by" in rule.model_fields_set:
                unknown = [n for n in rule.suppressed_by if n not in seen]
                if unknown:
                    raise ValueError(
                        f"rule {rule.name!r}: suppressed_by must name rules of this set; "
                        f"found {', '.join(map(repr, unknown))}"
                    )
        return self
