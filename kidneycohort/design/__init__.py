"""Designing a trial by simulation: power and sample size for slope and time-to-event
endpoints.

A design config (:class:`DesignConfig`, YAML through :func:`load_design`) states the
scenario (baseline GFR and UACR, slopes, acute and chronic treatment effects and their
between-patient variation, dropout, accrual and follow-up, visits, measurement
variation), the candidate endpoints with the study's own endpoint definitions and
slope-model settings, the sample sizes, the number of simulated trials, alpha and a
seed. :func:`simulate_power` draws every trial with the synthetic cohort generator,
analyses it with the study code (harmonisation, eGFR, baseline, endpoint derivation,
the exact mixed-model slope engine, the Cox partial likelihood) and writes a folder
with the per-trial estimates, power with Monte Carlo SEs, type I error under a null
scenario, bias and coverage, expected events, a power curve and a short report.
``kidneycohort design CONFIG.yaml`` is the command-line form.
"""

from __future__ import annotations

from kidneycohort.design._config import DesignConfig, load_design
from kidneycohort.design._run import DesignResult, simulate_power

__all__ = ["DesignConfig", "DesignResult", "load_design", "simulate_power"]
