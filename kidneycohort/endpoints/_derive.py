"""The derivation engine: one time-to-event row per patient per endpoint definition."""

from __future__ import annotations

import datetime as dt
import logging
from collections.abc import Mapping, Sequence
from typing import Any

import polars as pl

from kidneycohort import schemas
from kidneycohort._frames import FrameLike, conform, follows_input
from kidneycohort.endpoints._definitions import (
    _LAB_KINDS,
    _PERCENT_TOLERANCE,
    Composite,
    Death,
    EgfrBelow,
    EgfrDecline,
    EndpointDefinition,
    EndpointRule,
    KidneyDeath,
    KidneyFailure,
    _resolve_order,
    _validate,
    parse_endpoint_definitions,
)
from kidneycohort.endpoints._timeline import (
    _Context,
    _parse_date,
    _patient_frame,
    _prepare_baseline,
    _prepare_egfr,
    _prepare_events,
    _prepare_patients,
)
from kidneycohort.errors import ConfigError

__all__ = ["derive_endpoints"]

logger = logging.getLogger(__name__)


def _days(expr: pl.Expr) -> pl.Expr:
    return expr.dt.total_days()


def _finish(frame: pl.DataFrame, name: str) -> pl.DataFrame:
    """Common output columns from start_date/end_date/event/competing/reason."""
    return frame.select(
        "pcode",
        "patient_id",
        pl.lit(name).alias("endpoint"),
        pl.col("index_date").alias("start_date"),
        "end_date",
        (_days(pl.col("end_date") - pl.col("index_date")) / schemas.DAYS_PER_YEAR).alias("years"),
        pl.col("event").cast(pl.Int8),
        pl.col("competing").cast(pl.Int8),
        "reason",
    )


def _not_evaluable(reason_col: str) -> list[pl.Expr]:
    ne = pl.col(reason_col).is_not_null()
    return [
        pl.when(ne).then(None).otherwise(pl.col("end_date")).alias("end_date"),
        pl.when(ne).then(None).otherwise(pl.col("event")).alias("event"),
        pl.when(ne).then(None).otherwise(pl.col("competing")).alias("competing"),
        pl.when(ne).then(pl.col(reason_col)).otherwise(pl.col("reason")).alias("reason"),
    ]


def _needs_baseline(defn: EgfrDecline | EgfrBelow) -> bool:
    return isinstance(defn, EgfrDecline) or defn.and_decline_percent is not None


def _criterion(defn: EgfrDecline | EgfrBelow, value: pl.Expr) -> pl.Expr:
    base = pl.col("baseline_egfr")
    fall = (base - value) / base * 100.0
    if isinstance(defn, EgfrDecline):
        return fall >= defn.percent - _PERCENT_TOLERANCE
    crit = value < defn.threshold
    if defn.and_decline_percent is not None:
        crit = crit & (fall >= defn.and_decline_percent - _PERCENT_TOLERANCE)
    return crit


def _lab_endpoint(ctx: _Context, defn: EgfrDecline | EgfrBelow, rule: EndpointRule) -> pl.DataFrame:
    base = ctx.patient_base(rule.min_dialysis_days)
    v = ctx.values_with_next(rule.min_dialysis_days, rule.confirm_after_days)
    _, last = ctx.values(rule.min_dialysis_days)
    needs_baseline = _needs_baseline(defn)
    if needs_baseline:
        v = v.filter(pl.col("baseline_egfr").is_not_null())
    qualifies = _criterion(defn, pl.col("egfr"))
    v = v.with_columns(qualifies.alias("q")).with_columns(
        pl.col("date").filter(~pl.col("q")).max().over("pcode").alias("last_nonqualifying"),
    )
    after_grace = pl.col("date") > pl.col("index_date") + pl.duration(days=rule.grace_period_days)
    trigger = pl.col("q") & after_grace
    stays = pl.col("last_nonqualifying").is_null() | (pl.col("date") > pl.col("last_nonqualifying"))
    has_next = pl.col("next_date").is_not_null()
    if rule.confirmation == "next_value":
        confirmed = trigger & has_next & _criterion(defn, pl.col("next_egfr")).fill_null(False)
        if rule.confirm_within_days is not None:
            confirmed = confirmed & (
                _days(pl.col("next_date") - pl.col("date")) <= rule.confirm_within_days
            )
        confirmed_reason = "confirmed"
    else:
        confirmed = trigger & has_next & stays
        confirmed_reason = "sustained"
    unconfirmable = trigger & ~has_next & stays

    fu_end = pl.col("fu_end")
    death_in = pl.when(pl.col("death_date") <= fu_end).then(pl.col("death_date"))
    kf_in = pl.when(pl.col("kf_date") <= fu_end).then(pl.col("kf_date"))
    follow = pl.min_horizontal(death_in, kf_in)
    follow_reason = (
        pl.when(death_in.is_not_null() & (death_in == follow))
        .then(pl.lit("unconfirmed_then_death"))
        .otherwise(pl.lit("unconfirmed_then_kidney_failure"))
    )
    followed = follow.is_not_null() & (
        _days(follow - pl.col("date")) <= rule.death_or_failure_within_days
    )
    first = rule.event_date == "first_qualifying"
    confirmed_date = pl.col("date") if first else pl.col("next_date")
    if rule.unconfirmed_last_value == "event":
        late_ok, late_date, late_reason = (
            pl.lit(True),
            pl.col("date"),
            pl.lit("unconfirmed_last_value"),
        )
    elif rule.unconfirmed_last_value == "event_if_death_or_failure":
        late_ok, late_date, late_reason = (
            followed,
            (pl.col("date") if first else follow),
            follow_reason,
        )
    else:
        late_ok, late_date, late_reason = pl.lit(False), pl.col("date"), pl.lit("")
    counted = (
        v.filter(confirmed | (unconfirmable & late_ok))
        .with_columns(
            pl.when(confirmed).then(confirmed_date).otherwise(late_date).alias("event_date"),
            pl.when(confirmed)
            .then(pl.lit(confirmed_reason))
            .otherwise(late_reason)
            .alias("event_reason"),
        )
        .sort("pcode", "event_date", "date")
        .group_by("pcode", maintain_order=True)
        .first()
        .select("pcode", "event_date", "event_reason")
    )
    out = base.join(counted, on="pcode", how="left", maintain_order="left").join(
        last, on="pcode", how="left", maintain_order="left"
    )

    death_first = (pl.col("death_date") <= fu_end) & (
        pl.col("kf_date").is_null() | (pl.col("death_date") <= pl.col("kf_date"))
    )
    # a death censored at the last assessment (cause-specific plans) is not competing
    censor_death = rule.death_before_event == "censor_at_last_assessment"
    death_competes = death_first & pl.lit(not censor_death)
    death_censored = death_first & pl.lit(censor_death)
    kf_ends = pl.col("kf_date") <= fu_end
    if rule.lab_censoring == "last_assessment":
        last_or_start = pl.coalesce("last_date", "index_date")
        kf_end, plain_end = last_or_start, last_or_start
        plain_reason = (
            pl.when(pl.col("last_date").is_null())
            .then(pl.lit("no_post_index_assessment"))
            .otherwise(pl.lit("last_assessment"))
        )
    else:
        kf_end, plain_end, plain_reason = pl.col("kf_date"), fu_end, pl.col("fu_end_reason")
    has_event = pl.col("event_date").is_not_null()
    out = out.with_columns(
        pl.when(has_event)
        .then(pl.col("event_date"))
        .when(death_competes)
        .then(pl.col("death_date"))
        .when(death_censored)
        .then(pl.coalesce("last_date", "index_date"))
        .when(kf_ends)
        .then(kf_end)
        .otherwise(plain_end)
        .alias("end_date"),
        has_event.cast(pl.Int8).alias("event"),
        (~has_event & death_competes.fill_null(False)).cast(pl.Int8).alias("competing"),
        pl.when(has_event)
        .then(pl.col("event_reason"))
        .when(death_competes)
        .then(pl.lit("death"))
        .when(death_censored)
        .then(pl.lit("death_censored_at_last_assessment"))
        .when(kf_ends)
        .then(pl.lit("kidney_failure"))
        .otherwise(plain_reason)
        .alias("reason"),
        pl.coalesce(
            "not_evaluable",
            "prevalent_kf",
            pl.when(pl.col("baseline_egfr").is_null() & pl.lit(needs_baseline)).then(
                pl.lit("no_baseline")
            ),
        ).alias("why_not"),
    ).with_columns(_not_evaluable("why_not"))
    return _finish(out, defn.name)


def _simple_event(
    base: pl.DataFrame, name: str, event_date: pl.Expr, reason: pl.Expr, death_competes: bool
) -> pl.DataFrame:
    fu_end = pl.col("fu_end")
    ev_in = event_date <= fu_end
    if death_competes:
        ev_in = ev_in & (pl.col("death_date").is_null() | (event_date <= pl.col("death_date")))
        comp = ~ev_in.fill_null(False) & (pl.col("death_date") <= fu_end).fill_null(False)
    else:
        comp = pl.lit(False)
    ev = ev_in.fill_null(False)
    out = base.with_columns(
        pl.when(ev)
        .then(event_date)
        .when(comp)
        .then(pl.col("death_date"))
        .otherwise(fu_end)
        .alias("end_date"),
        ev.cast(pl.Int8).alias("event"),
        comp.cast(pl.Int8).alias("competing"),
        pl.when(ev)
        .then(reason)
        .when(comp)
        .then(pl.lit("death"))
        .otherwise(pl.col("fu_end_reason"))
        .alias("reason"),
    )
    return out


def _kidney_failure_endpoint(
    ctx: _Context, defn: KidneyFailure, rule: EndpointRule
) -> pl.DataFrame:
    base = ctx.patient_base(rule.min_dialysis_days)
    sources = [
        (defn.dialysis, "dialysis_date", "dialysis"),
        (defn.transplant, "transplant_date", "transplant"),
        (defn.patient_kfrt_date, "kfrt_date", "kfrt_date"),
    ]
    used = [(c, r) for on, c, r in sources if on]
    if used:
        onset = pl.min_horizontal(*[pl.col(c) for c, _ in used])
        reason = pl.lit(None, dtype=pl.String)
        for column, label in reversed(used):
            reason = pl.when(pl.col(column) == onset).then(pl.lit(label)).otherwise(reason)
    else:
        onset, reason = pl.lit(None, dtype=pl.Date), pl.lit(None, dtype=pl.String)
    out = _simple_event(base, defn.name, onset, reason, death_competes=True)
    out = out.with_columns(
        pl.coalesce("not_evaluable", "prevalent_kf").alias("why_not")
    ).with_columns(_not_evaluable("why_not"))
    return _finish(out, defn.name)


def _death_endpoint(ctx: _Context, defn: Death | KidneyDeath, rule: EndpointRule) -> pl.DataFrame:
    base = ctx.patient_base(rule.min_dialysis_days)
    if isinstance(defn, Death):
        out = _simple_event(
            base, defn.name, pl.col("death_date"), pl.lit("death"), death_competes=False
        )
    else:
        out = _simple_event(
            base,
            defn.name,
            pl.col("kidney_death_date"),
            pl.lit("kidney_death"),
            death_competes=True,
        )
    out = out.with_columns(_not_evaluable("not_evaluable"))
    return _finish(out, defn.name)


def _composite(defn: Composite, parts: list[pl.DataFrame]) -> pl.DataFrame:
    """Combine component rows column-wise (every part is one row per patient, pcode order)."""
    frame = parts[0].select("pcode", "patient_id", pl.col("start_date").alias("index_date"))
    for k, part in enumerate(parts):
        frame = frame.with_columns(
            part["end_date"].alias(f"end_{k}"),
            pl.when(part["event"] == 1).then(part["end_date"]).alias(f"ev_{k}"),
            part["reason"].alias(f"reason_{k}"),
            (part["competing"] == 1).alias(f"comp_{k}"),
            pl.when(part["event"].is_null()).then(part["reason"]).alias(f"na_{k}"),
        )
    ks = range(len(parts))
    event_date = pl.min_horizontal([pl.col(f"ev_{k}") for k in ks])
    censor_date = pl.min_horizontal([pl.col(f"end_{k}") for k in ks])
    names = [defn.components[k] for k in ks]
    out = frame.with_columns(
        event_date.alias("event_date"),
        pl.concat_str(
            [pl.when(pl.col(f"ev_{k}") == event_date).then(pl.lit(names[k])) for k in ks],
            separator="+",
            ignore_nulls=True,
        ).alias("event_reason"),
        censor_date.alias("censor_date"),
        pl.coalesce(
            [pl.when(pl.col(f"end_{k}") == censor_date).then(pl.col(f"reason_{k}")) for k in ks]
        ).alias("censor_reason"),
        pl.any_horizontal(
            [
                ((pl.col(f"end_{k}") == censor_date) & pl.col(f"comp_{k}")).fill_null(False)
                for k in ks
            ]
        ).alias("censor_competing"),
        pl.coalesce([pl.col(f"na_{k}") for k in ks]).alias("why_not"),
    )
    has_event = pl.col("event_date").is_not_null()
    out = out.with_columns(
        pl.when(has_event)
        .then(pl.col("event_date"))
        .otherwise(pl.col("censor_date"))
        .alias("end_date"),
        has_event.cast(pl.Int8).alias("event"),
        (~has_event & pl.col("censor_competing")).cast(pl.Int8).alias("competing"),
        pl.when(has_event)
        .then(pl.col("event_reason"))
        .otherwise(pl.col("censor_reason"))
        .alias("reason"),
    ).with_columns(_not_evaluable("why_not"))
    return _finish(out, defn.name)


@follows_input
def derive_endpoints(
    egfr: FrameLike,
    baseline: FrameLike,
    patients: FrameLike,
    events: FrameLike | None = None,
    definitions: Sequence[EndpointDefinition | Mapping[str, Any]] = (),
    *,
    equation: str,
    data_cut: dt.date | str,
    rule: EndpointRule | Mapping[str, Any] | None = None,
) -> pl.DataFrame:
    r"""Derive time-to-event rows, one per patient per endpoint definition.

    Parameters
    ----------
    egfr
        Long eGFR table (:data:`~kidneycohort.schemas.EGFR`; polars or pandas); only
        rows of ``equation`` are used. Same-day values are averaged.
    baseline
        Baseline table (:data:`~kidneycohort.schemas.BASELINE`); rows of ``equation``.
    patients
        Patients table: ``patient_id``, ``index_date`` and optionally ``death_date``,
        ``kfrt_date``, ``end_of_followup``.
    events
        Optional events table (``dialysis``, ``transplant``, ``death``,
        ``kidney_death``; ``end_date`` closes a dialysis episode).
    definitions
        Endpoint definitions (models, or config mappings with a ``kind`` key).
    equation
        The study's primary eGFR equation id.
    data_cut
        Data-cut date: nothing after it is used and every endpoint is censored at it.
    rule
        Default :class:`EndpointRule` (definitions may carry their own).

    Returns
    -------
    polars.DataFrame
        :data:`~kidneycohort.schemas.ENDPOINTS` columns, ordered by definition then
        ``patient_id``. ``years`` is

        .. math:: (\text{end\_date} - \text{start\_date})_{\text{days}} / 365.25 .

        ``event`` is 1 for an event and 0 for censoring; ``competing`` is 1 when death
        ended follow-up first (``end_date`` is then the death date). A patient who cannot
        be evaluated has null ``end_date``/``years``/``event``/``competing`` and a
        ``reason`` of :data:`NOT_EVALUABLE_REASONS`.

    Raises
    ------
    InputDataError
        Missing columns, unknown event codes, duplicated patients or baselines, an
        equation absent from the eGFR or baseline table.
    ConfigError
        Invalid definitions or rules (duplicate names, unknown composite components).

    Notes
    -----
    Follow-up of every endpoint ends at the earliest of ``data_cut``,
    ``end_of_followup`` and death; events after it are not used. For lab-based
    endpoints the patient is no longer at risk from kidney-failure onset; censoring
    then carries the reason ``kidney_failure``. A composite's event is the earliest
    component event; with none, it ends at the earliest component end.

    References
    ----------
    .. [1] Levey AS et al. GFR decline as an end point for clinical trials in CKD.
       Am J Kidney Dis. 2014;64(6):821-835. doi:10.1053/j.ajkd.2014.07.030
    """
    if isinstance(rule, EndpointRule) or rule is None:
        default_rules = rule or EndpointRule()
    else:
        default_rules = _validate(EndpointRule.model_validate, dict(rule), "rule")
    defs = parse_endpoint_definitions(list(definitions))
    if not defs:
        raise ConfigError("endpoints: no endpoint definitions given; pass definitions=[...]")
    _resolve_order(defs)
    cut = _parse_date(data_cut, "data_cut")
    needs_labs = any(isinstance(d, _LAB_KINDS) for d in defs)

    events_frame = _prepare_events(events)
    p = _patient_frame(_prepare_patients(patients), events_frame, cut)
    ctx = _Context(
        p=p,
        events=events_frame,
        egfr=_prepare_egfr(egfr, equation, needs_labs),
        baseline=(
            _prepare_baseline(baseline, equation)
            if needs_labs
            else pl.DataFrame(schema={"patient_id": pl.String(), "baseline_egfr": pl.Float64()})
        ),
    )
    results: dict[str, pl.DataFrame] = {}
    by_name = {d.name: d for d in defs}

    def evaluate(d: EndpointDefinition) -> pl.DataFrame:
        if d.name in results:
            return results[d.name]
        if isinstance(d, Composite):
            out = _composite(d, [evaluate(by_name[c]) for c in d.components])
        else:
            r = getattr(d, "rule", None) or default_rules
            if isinstance(d, _LAB_KINDS):
                out = _lab_endpoint(ctx, d, r)
            elif isinstance(d, KidneyFailure):
                out = _kidney_failure_endpoint(ctx, d, r)
            else:
                out = _death_endpoint(ctx, d, r)
        results[d.name] = out.sort("pcode")
        logger.info(
            "endpoint %s: %d events, %d competing, %d not evaluable",
            d.name,
            int(results[d.name]["event"].sum() or 0),
            int(results[d.name]["competing"].sum() or 0),
            results[d.name]["event"].null_count(),
        )
        return results[d.name]

    return conform(pl.concat([evaluate(d) for d in defs]), schemas.ENDPOINTS)
