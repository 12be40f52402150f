# The theophylline data (R's `Theoph`) exported in cistern's formats, and a population fit of
# them with R's general-purpose mixed-effects library nlme, for `cistern population`'s tests.
#
# Run from the repository root:
#
#     Rscript tests/reference/population/theoph.R
#     python3 tests/reference/population/likelihood.py theoph   # adds the exact -2LL at nlme's estimates
#
# Writes tests/reference/population/theoph/{doses.csv, levels.csv, covariates.csv, nlme.json,
# nlme_model.toml, start_model.toml}. Needs R with the nlme package (Debian: r-base-core,
# r-cran-nlme). The data: R's datasets package, ?Theoph (source given there: Boeckmann, Sheiner
# and Beal, 1994; analysed with a first-order absorption model by Pinheiro and Bates, 2000).
#
# The model: conc = F D ka / (V (ka - k)) (exp(-k t) - exp(-ka t)), k = CL / V, F = 1, with
# D = Dose [mg/kg] * Wt [kg] the whole dose in mg; fixed effects lCl, lV, lKa (natural logs of
# CL in L/h, V in L, ka in 1/h), independent random effects on all three (pdDiag), additive
# residual error; estimated by maximum likelihood (method = "ML").

suppressPackageStartupMessages(library(nlme))

args <- commandArgs(trailingOnly = FALSE)
script <- sub("^--file=", "", args[grep("^--file=", args)])
out_dir <- file.path(dirname(normalizePath(script)), "theoph")
dir.create(out_dir, showWarnings = FALSE)

# The shortest decimal text (15 to 17 significant digits) that reads back as the same double.
num <- function(x) vapply(x, function(v) {
  for (digits in 15:17) {
    text <- sprintf("%.*g", digits, v)
    if (as.numeric(text) == v) return(text)
  }
  text
}, "")
header <- c(
  "# R's Theoph data set (datasets package, R %s; see ?Theoph): theophylline after one oral dose,",
  "# 12 subjects. Exported by tests/reference/population/theoph.R. %s"
)
comment <- function(what) sprintf(paste(header, collapse = "\n"), getRversion(), what)

d <- as.data.frame(Theoph)
d$subject <- paste0("S", formatC(as.integer(as.character(d$Subject)), width = 2, flag = "0"))
d$dose_mg <- d$Dose * d$Wt
d <- d[order(d$subject, d$Time), ]
subjects <- unique(d[, c("subject", "dose_mg", "Wt", "Dose")])
subjects <- subjects[order(subjects$subject), ]

writeLines(c(
  comment("The dose: Dose [mg/kg] x Wt [kg]."),
  "subject,time_h,amount_mg,route",
  sprintf("%s,0,%s,oral", subjects$subject, num(subjects$dose_mg))
), file.path(out_dir, "doses.csv"))
writeLines(c(
  comment("Every level as recorded, including those at time 0."),
  "subject,time_h,conc_mg_l",
  sprintf("%s,%s,%s", d$subject, num(d$Time), num(d$conc))
), file.path(out_dir, "levels.csv"))
writeLines(c(
  comment("Body weight in kg."),
  "subject,weight_kg",
  sprintf("%s,%s", subjects$subject, num(subjects$Wt))
), file.path(out_dir, "covariates.csv"))

data <- groupedData(conc ~ Time | subject, data = d[, c("subject", "Time", "conc", "dose_mg")])
one_compartment_oral <- function(dose, t, lCl, lV, lKa) {
  k <- exp(lCl - lV)
  ka <- exp(lKa)
  dose * ka / (exp(lV) * (ka - k)) * (exp(-k * t) - exp(-ka * t))
}
start <- c(lCl = log(3), lV = log(30), lKa = log(1.5))
fit_once <- function() {
  nlme(conc ~ one_compartment_oral(dose_mg, Time, lCl, lV, lKa),
       data = data,
       fixed = lCl + lV + lKa ~ 1,
       random = pdDiag(lCl + lV + lKa ~ 1),
       start = start,
       method = "ML",
       control = nlmeControl(msMaxIter = 200, maxIter = 200, pnlsMaxIter = 50, tolerance = 1e-8))
}

seconds <- numeric(5)
for (i in seq_along(seconds)) {
  t0 <- proc.time()[["elapsed"]]
  fit <- fit_once()
  seconds[i] <- proc.time()[["elapsed"]] - t0
}

# The same fit from another start: a check that the optimum does not depend on where it began.
start <- c(lCl = log(2), lV = log(45), lKa = log(0.8))
other <- fit_once()
start <- c(lCl = log(3), lV = log(30), lKa = log(1.5))

fe <- fixef(fit)
re_sd <- sqrt(diag(pdMatrix(fit$modelStruct$reStruct)[[1]])) * fit$sigma
names(re_sd) <- c("lCl", "lV", "lKa")
sigma <- fit$sigma
ll <- as.numeric(logLik(fit))
cv <- function(sd) sqrt(exp(sd^2) - 1)
n_obs <- nrow(d)
iterations <- fit$numIter

json_num <- num
json <- c(
  "{",
  '  "generated_by": "tests/reference/population/theoph.R",',
  sprintf('  "r_version": "%s",', getRversion()),
  sprintf('  "nlme_version": "%s",', packageVersion("nlme")),
  '  "data": "R datasets::Theoph (see ?Theoph); doses in mg = Dose * Wt",',
  sprintf('  "n_subjects": %d,', nrow(subjects)),
  sprintf('  "n_observations": %d,', n_obs),
  '  "model": "conc = D ka / (V (ka - k)) (exp(-k t) - exp(-ka t)), k = CL/V; fixed lCl + lV + lKa ~ 1; random pdDiag(lCl + lV + lKa ~ 1); additive residual",',
  '  "method": "ML",',
  sprintf('  "start": {"lCl": %s, "lV": %s, "lKa": %s},', json_num(start[["lCl"]]), json_num(start[["lV"]]), json_num(start[["lKa"]])),
  sprintf('  "fixed_effects": {"lCl": %s, "lV": %s, "lKa": %s},', json_num(fe[["lCl"]]), json_num(fe[["lV"]]), json_num(fe[["lKa"]])),
  sprintf('  "typical": {"cl_l_h": %s, "v_l": %s, "ka_per_h": %s},', json_num(exp(fe[["lCl"]])), json_num(exp(fe[["lV"]])), json_num(exp(fe[["lKa"]]))),
  sprintf('  "random_effect_sd": {"lCl": %s, "lV": %s, "lKa": %s},', json_num(re_sd[["lCl"]]), json_num(re_sd[["lV"]]), json_num(re_sd[["lKa"]])),
  sprintf('  "bsv_cv": {"cl_cv": %s, "v_cv": %s, "ka_cv": %s},', json_num(cv(re_sd[["lCl"]])), json_num(cv(re_sd[["lV"]])), json_num(cv(re_sd[["lKa"]]))),
  sprintf('  "residual_sd_mg_l": %s,', json_num(sigma)),
  sprintf('  "logLik": %s,', json_num(ll)),
  sprintf('  "minus2logLik": %s,', json_num(-2 * ll)),
  sprintf('  "aic": %s,', json_num(AIC(fit))),
  sprintf('  "bic": %s,', json_num(BIC(fit))),
  sprintf('  "convergence": {"converged": true, "outer_iterations": %d, "approximate_covariance_positive_definite": %s, "control": "msMaxIter 200, maxIter 200, pnlsMaxIter 50, tolerance 1e-8", "note": "nlme stops with an error when it does not converge (returnObject = FALSE); this run returned estimates", "other_start": {"lCl": %s, "lV": %s, "lKa": %s}, "other_start_minus2logLik": %s, "other_start_max_abs_difference_fixed": %s},',
          as.integer(iterations), tolower(is.matrix(fit$apVar)),
          json_num(log(2)), json_num(log(45)), json_num(log(0.8)), json_num(-2 * as.numeric(logLik(other))),
          json_num(max(abs(fixef(other) - fe)))),
  sprintf('  "fit_seconds_runs": [%s],', paste(sprintf("%.3f", seconds), collapse = ", ")),
  sprintf('  "fit_seconds_median": %.3f', median(seconds)),
  "}"
)
writeLines(json, file.path(out_dir, "nlme.json"))

toml <- function(title, cl, v, ka, cl_cv, v_cv, ka_cv, additive) c(
  title,
  "",
  "[drug]",
  'name = "theophylline (R Theoph data)"',
  "",
  "[clearance]",
  sprintf("typical_l_h = %s", cl),
  sprintf("bsv_cv = %s", cl_cv),
  "",
  "[volume]",
  sprintf("typical_l = %s", v),
  sprintf("bsv_cv = %s", v_cv),
  "",
  "[absorption]",
  sprintf("typical_ka_per_h = %s", ka),
  sprintf("bsv_cv = %s", ka_cv),
  "",
  "[residual]",
  sprintf("additive_mg_l = %s", additive),
  "proportional_cv = 0.0"
)
writeLines(toml(
  c(
    "# nlme's maximum-likelihood estimates for R's Theoph data, written as a cistern model file by",
    sprintf("# tests/reference/population/theoph.R (nlme %s in R %s).", packageVersion("nlme"), getRversion()),
    "# typical = exp(fixed effect); bsv_cv = sqrt(exp(sd^2) - 1) of the random effect's SD;",
    "# additive_mg_l = nlme's residual SD. Not a recommendation for any patient: a reference for tests."
  ),
  num(exp(fe[["lCl"]])), num(exp(fe[["lV"]])), num(exp(fe[["lKa"]])),
  num(cv(re_sd[["lCl"]])), num(cv(re_sd[["lV"]])), num(cv(re_sd[["lKa"]])), num(sigma)
), file.path(out_dir, "nlme_model.toml"))
writeLines(toml(
  c(
    "# A rounded starting model for estimating the population model of R's Theoph data, written by",
    "# tests/reference/population/theoph.R. The values are round guesses, not estimates."
  ),
  "3.0", "30.0", "1.5", "0.3", "0.3", "0.3", "1.0"
), file.path(out_dir, "start_model.toml"))

cat(sprintf("nlme: lCl %.6f lV %.6f lKa %.6f; SDs %.5f %.5f %.5f; sigma %.5f; -2logLik %.6f; median %.3f s\n",
            fe[["lCl"]], fe[["lV"]], fe[["lKa"]], re_sd[["lCl"]], re_sd[["lV"]], re_sd[["lKa"]], sigma, -2 * ll,
            median(seconds)))
