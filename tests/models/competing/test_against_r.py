"""Optional cross-checks against R on simulated cohorts: cmprsk ``crr`` and ``cuminc``
(Gray 2000-2024, the reference implementation of Fine & Gray 1999 and Gray 1988) and
survival's ``finegray`` + ``coxph`` (Geskus 2011 expanded data) and ``coxph``.

Skipped, with the reason, when Rscript or the cmprsk package is absent (CI does not
install R); the same quantities are checked against recorded R output in
test_competing_risks.py.
"""

from __future__ import annotations

import shutil
import subprocess
from pathlib import Path

import numpy as np
import polars as pl
import pytest

from kidneycohort.models.competing._cause_specific import cause_specific_arrays
from kidneycohort.models.competing._fine_gray import fine_gray_arrays
from kidneycohort.models.competing._gray_test import aalen_johansen_by_group, gray_test
from tests._fixtures.competing import simulate_competing


def _r_ready() -> str | None:
    """None when R with cmprsk and survival can run, else why not."""
    if shutil.which("Rscript") is None:
        return "Rscript is not installed (optional cross-check; Debian r-cran-cmprsk)"
    probe = subprocess.run(
        [
            "Rscript",
            "-e",
            "quit(status = !all(sapply(c('cmprsk', 'survival'), requireNamespace, quietly = TRUE)))",
        ],
        capture_output=True,
        check=False,
    )
    return None if probe.returncode == 0 else "R packages cmprsk or survival are not installed"


SKIP = _r_ready()
pytestmark = pytest.mark.skipif(SKIP is not None, reason=SKIP or "")

R_SCRIPT = r"""
suppressMessages({library(cmprsk); library(survival)})
args <- commandArgs(trailingOnly = TRUE)
d <- read.csv(args[1])
out <- function(name, x) cat(name, format(as.numeric(x), digits = 17), "\n")
x <- cbind(d$treated, d$age, d$female)
f <- crr(d$t, d$cause, x, gtol = 1e-12, maxiter = 100)
out("crr_coef", f$coef); out("crr_se", sqrt(diag(f$var))); out("crr_times", f$uftime)
p <- predict(f, cov1 = rbind(c(0, 62, 1), c(1, 62, 1)))
out("crr_predict_control", p[, 2]); out("crr_predict_treated", p[, 3])
for (rho in c(0, 1)) {
  ci <- cuminc(d$t, d$cause, d$treated, rho = rho)
  out(paste0("cuminc_rho", rho), ci$Tests[1, 1:2])
}
out("cuminc_strata", cuminc(d$t, d$cause, d$treated, strata = d$female)$Tests[1, 1:2])
grid <- c(0.5, 1, 2, 4)
est <- timepoints(cuminc(d$t, d$cause, d$treated), grid)$est
for (r in rownames(est)) out(paste0("cif_", gsub(" ", "_", r)), est[r, ])
for (k in 1:2) {
  m <- coxph(Surv(t, cause == k) ~ treated + age + female, data = d, ties = "efron")
  out(paste0("coxph", k, "_coef"), coef(m)); out(paste0("coxph", k, "_se"), sqrt(diag(m$var)))
}
if (args[2] == "continuous") {
  d$id <- seq_len(nrow(d))
  d$status <- factor(d$cause, 0:2, labels = c("censor", "event", "competing"))
  e <- finegray(Surv(t, status) ~ ., data = d, etype = "event")
  g <- coxph(Surv(fgstart, fgstop, fgstatus) ~ treated + age + female + cluster(id),
             weights = fgwt, data = e, ties = "breslow")
  out("finegray_coef", coef(g)); out("finegray_robust_se", sqrt(diag(g$var)))
}
"""


RResults = tuple[dict[str, np.ndarray], tuple[np.ndarray, np.ndarray, np.ndarray]]


def _run_r(tmp_path: Path, decimals: int | None) -> RResults:
    endpoints, patients = simulate_competing(600, seed=21, decimals=decimals)
    time = endpoints["years"].to_numpy()
    cause = (endpoints["event"] + 2 * endpoints["competing"]).to_numpy()
    design = np.column_stack(
        [
            (patients["group"] == "treated").to_numpy(),
            patients["age"].to_numpy(),
            patients["female"].to_numpy(),
        ]
    ).astype(float)
    data = tmp_path / "cohort.csv"
    pl.DataFrame(
        {
            "t": time,
            "cause": cause,
            "treated": design[:, 0],
            "age": design[:, 1],
            "female": design[:, 2],
        }
    ).write_csv(data, float_precision=17)
    script = tmp_path / "check.R"
    script.write_text(R_SCRIPT)
    kind = "continuous" if decimals is None else "tied"
    done = subprocess.run(
        ["Rscript", str(script), str(data), kind], capture_output=True, text=True, check=True
    )
    results = {}
    for line in done.stdout.splitlines():
        name, *values = line.split()
        results[name] = np.array([float(v) for v in values])
    return results, (time, cause, design)


@pytest.fixture(scope="module", params=[None, 2], ids=["continuous", "tied"])
def r_run(request: pytest.FixtureRequest, tmp_path_factory: pytest.TempPathFactory) -> RResults:
    """R's results on one simulated cohort: continuous times, or rounded to 0.01 years."""
    return _run_r(tmp_path_factory.mktemp("r"), request.param)


def test_fine_gray_against_crr(r_run: RResults) -> None:
    """cmprsk crr: coefficients, robust standard errors and predict.crr, with and without
    ties (times rounded to 0.01 years); survival coxph of each cause (Efron); to 1e-6."""
    r, (time, cause, design) = r_run
    fit = fine_gray_arrays(time, cause, design, tolerance=1e-12)
    np.testing.assert_allclose(fit.beta, r["crr_coef"], rtol=1e-6, atol=1e-9)
    np.testing.assert_allclose(fit.se, r["crr_se"], rtol=1e-6)
    np.testing.assert_allclose(fit.failure_times, r["crr_times"], rtol=1e-12)
    for name, treated in (("control", 0.0), ("treated", 1.0)):
        predicted = fit.cumulative_incidence(np.array([treated, 62.0, 1.0]))
        np.testing.assert_allclose(predicted, r[f"crr_predict_{name}"], rtol=1e-6)
    for k in (1, 2):
        cox = cause_specific_arrays(time, cause, design, of_cause=k, ties="efron", tolerance=1e-12)
        np.testing.assert_allclose(cox.beta, r[f"coxph{k}_coef"], rtol=1e-6, atol=1e-9)
        np.testing.assert_allclose(cox.se, r[f"coxph{k}_se"], rtol=1e-6)
    if "finegray_coef" in r:
        # survival::finegray expanded data + coxph(cluster(id)): the robust variance with
        # the weights taken as known (Geskus 2011) is our se_fixed_weights
        np.testing.assert_allclose(fit.beta, r["finegray_coef"], rtol=1e-6, atol=1e-9)
        np.testing.assert_allclose(fit.se_fixed_weights, r["finegray_robust_se"], rtol=1e-6)


def test_gray_test_and_incidence_against_cuminc(r_run: RResults) -> None:
    """cmprsk cuminc: Gray's statistic and p (rho 0 and 1, and stratified by sex) and
    the Aalen–Johansen incidence of both causes at 0.5, 1, 2, 4 years; to 1e-9."""
    r, (time, cause, design) = r_run
    group = design[:, 0].astype(int)
    for rho in (0, 1):
        found = gray_test(time, cause, group, rho=rho)
        np.testing.assert_allclose([found.statistic, found.p], r[f"cuminc_rho{rho}"], rtol=1e-9)
    strat = gray_test(time, cause, group, strata=design[:, 2])
    np.testing.assert_allclose([strat.statistic, strat.p], r["cuminc_strata"], rtol=1e-9)
    curves = aalen_johansen_by_group(time, cause, group).sort("years")
    grid = pl.DataFrame({"years": [0.5, 1.0, 2.0, 4.0]})
    for g in (0, 1):
        found = grid.join_asof(curves.filter(pl.col("group") == str(g)), on="years")
        np.testing.assert_allclose(found["event_incidence"], r[f"cif_{g}_1"], atol=1e-12)
        np.testing.assert_allclose(found["competing_incidence"], r[f"cif_{g}_2"], atol=1e-12)
