# Reference values of the Bayesian back-end with cluster intercepts: ML fits of the same mixed models
# with R's nlme, stored in tests/reference/bayes_cluster_reference.csv so the tests need no R.
#
# Data: the invented team example of the package (robustmod.demo.team_data() at its default seed),
# written to CSV:  python -c "from robustmod.demo import team_data; team_data().to_csv('teams.csv', index=False)"
# Run: Rscript bayes_cluster_reference.R teams.csv > bayes_cluster_reference.csv
# Two fits, both with team random intercepts and method = "ML": constant variance, and the exponential
# variance function log sd = g0 + g1 workload + g2 team_support (varComb of two varExp terms), the
# log-linear variance function of the Bayesian location-scale model.
suppressMessages(library(nlme))
args <- commandArgs(trailingOnly = TRUE)
d <- read.csv(args[1])
cat(sprintf("# %s; nlme %s\n", R.version.string, packageVersion("nlme")))
cat("model,quantity,term,value\n")
out <- function(model, quantity, term, value) cat(sprintf("%s,%s,%s,%.15g\n", model, quantity, term, value))
f <- wellbeing ~ workload * team_support
fits <- list(
  constant = lme(f, random = ~ 1 | team, data = d, method = "ML"),
  exponential = lme(f, random = ~ 1 | team, data = d, method = "ML",
                    weights = varComb(varExp(form = ~ workload), varExp(form = ~ team_support))))
for (m in names(fits)) {
  x <- fits[[m]]
  b <- fixef(x)
  se <- sqrt(diag(vcov(x)))
  for (t in names(b)) { out(m, "estimate", t, b[[t]]); out(m, "se", t, se[[t]]) }
  out(m, "intercept_sd", "team", as.numeric(VarCorr(x)[1, "StdDev"]))
  out(m, "residual_sd", "(scale)", x$sigma)
}
