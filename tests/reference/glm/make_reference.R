## Reference values for cairn's GLM engine (tests/glm_reference.rs).
##
## Run from the crate root:   Rscript tests/reference/glm/make_reference.R
## Writes, for every model below, <name>_data.csv (response, prior weight, offset and the
## model.matrix columns, so the Rust tests need no factor coding) and <name>.json (reference
## values, every number printed with sprintf("%.17g")).  Library versions are written into
## versions.txt and into every JSON file.
##
## Sources of the data: every dataset ships with R (package datasets) or with MASS / brglm2,
## except the clotting data, which are typed in from the example section of R's ?glm help page
## (McCullagh & Nelder 1989, Generalized Linear Models, 2nd ed., p. 300).
##
## Sources of the reference numbers:
##   stats::glm / glm.fit (binomial, Poisson, Gamma), MASS::glm.nb (negative binomial),
##   MASS::confint.glm (profile intervals, which interpolate a spline through the profile), an
##   exact root of the same profile statistic found here with uniroot (tol 1e-13) and glm.fit,
##   brglm2::brglmFit type = "AS_mean" (Firth's bias reduction = Jeffreys-prior penalty for logit),
##   and an HC0 sandwich covariance computed by hand in this script (no sandwich package).
suppressPackageStartupMessages({ library(MASS); library(brglm2) })

out_dir <- file.path("tests", "reference", "glm")
stopifnot(dir.exists(out_dir))

versions <- sprintf("%s; MASS %s; brglm2 %s", R.version.string,
                    as.character(packageVersion("MASS")), as.character(packageVersion("brglm2")))
writeLines(versions, file.path(out_dir, "versions.txt"))
cat(versions, "\n")

tight <- glm.control(epsilon = 1e-13, maxit = 200)
## glm.fit's own test (relative deviance change < epsilon) stops Fisher scoring for
## non-canonical links (probit, cloglog, Gamma log, NB log) while the score is still ~1e-8 in
## standard-error units, which moves some coefficients by ~1e-6 relative. Every reference fit is
## therefore "polished": restarted from its own estimate with a test that cannot be met, so
## glm.fit runs its full 100 iterations and ends at the fixed point of the iteration.
polish_control <- glm.control(epsilon = 1e-300, maxit = 100)
polish <- function(fit) suppressWarnings(update(fit, start = coef(fit), control = polish_control))

num <- function(x) {
  if (length(x) == 0) return("[]")
  paste0("[", paste(sprintf("%.17g", as.numeric(x)), collapse = ", "), "]")
}
str_json <- function(x) paste0("\"", x, "\"")
mat_json <- function(m) paste0("[", paste(apply(m, 1, num), collapse = ", "), "]")

write_data <- function(name, X, y, w, o) {
  d <- data.frame(response = y, weight = w, offset = o, X, check.names = FALSE)
  con <- file(file.path(out_dir, paste0(name, "_data.csv")), "w")
  writeLines(paste(c("response", "weight", "offset", colnames(X)), collapse = ","), con)
  for (i in seq_len(nrow(d))) writeLines(paste(sprintf("%.17g", as.numeric(d[i, ])), collapse = ","), con)
  close(con)
}

## HC0 sandwich by hand: bread = X' W X with the IRLS working weights, meat = sum of outer
## products of the score contributions x_i * w_prior_i * (y_i - mu_i) * mu.eta(eta_i) / V(mu_i).
hc0 <- function(X, y, w, mu, eta, fam) {
  mu_eta <- fam$mu.eta(eta)
  work_w <- w * mu_eta^2 / fam$variance(mu)
  bread <- crossprod(X, X * work_w)
  score <- X * (w * (y - mu) * mu_eta / fam$variance(mu))
  meat <- crossprod(score)
  bi <- solve(bread)
  bi %*% meat %*% bi
}

## Exact profile limits: the same statistic as MASS:::profile.glm, (D(b) - D_hat) / dispersion,
## set equal to critical^2 and solved by uniroot, each refit by glm.fit with the coefficient fixed
## through the offset.  For the negative binomial the family (and so theta) is held fixed, as
## MASS does when it profiles a glm.nb fit.
exact_profile <- function(X, y, w, o, fam, beta, se, deviance, dispersion, j, critical) {
  f <- function(b) {
    fit <- suppressWarnings(glm.fit(X[, -j, drop = FALSE], y, weights = w,
                                    offset = o + X[, j] * b, family = fam, control = polish_control))
    (fit$deviance - deviance) / dispersion - critical^2
  }
  lower_end <- beta[j] - se[j]; while (f(lower_end) < 0) lower_end <- lower_end - se[j]
  upper_end <- beta[j] + se[j]; while (f(upper_end) < 0) upper_end <- upper_end + se[j]
  c(uniroot(f, c(lower_end, beta[j]), tol = 1e-13)$root,
    uniroot(f, c(beta[j], upper_end), tol = 1e-13)$root)
}

emit <- function(name, fit, family_name, link_name, has_intercept, profile_columns = integer(0),
                 extra = character(0), iterations = fit$iter, confint_fit = fit,
                 dispersion = summary(fit)$dispersion) {
  X <- model.matrix(fit)
  y <- fit$y
  w <- fit$prior.weights
  o <- if (is.null(fit$offset)) rep(0, length(y)) else fit$offset
  write_data(name, X, y, w, o)
  s <- summary(fit, dispersion = dispersion)
  fam <- family(fit)
  beta <- coef(fit)
  se <- s$coefficients[, "Std. Error"]
  sandwich <- hc0(X, y, w, fit$fitted.values, fit$linear.predictors, fam)
  pearson <- sum(w * (y - fit$fitted.values)^2 / fam$variance(fit$fitted.values))
  fields <- c(
    sprintf("\"source\": %s", str_json(versions)),
    sprintf("\"name\": %s", str_json(name)),
    sprintf("\"family\": %s", str_json(family_name)),
    sprintf("\"link\": %s", str_json(link_name)),
    sprintf("\"has_intercept\": %s", if (has_intercept) "true" else "false"),
    sprintf("\"coefficient_names\": [%s]", paste(str_json(names(beta)), collapse = ", ")),
    sprintf("\"coefficients\": %s", num(beta)),
    sprintf("\"standard_errors\": %s", num(se)),
    sprintf("\"hc0_standard_errors\": %s", num(sqrt(diag(sandwich)))),
    sprintf("\"hc0_covariance\": %s", mat_json(sandwich)),
    sprintf("\"deviance\": %s", sprintf("%.17g", deviance(fit))),
    sprintf("\"null_deviance\": %s", sprintf("%.17g", fit$null.deviance)),
    sprintf("\"log_likelihood\": %s", sprintf("%.17g", as.numeric(logLik(fit)))),
    sprintf("\"dispersion\": %s", sprintf("%.17g", dispersion)),
    sprintf("\"pearson_chi_square\": %s", sprintf("%.17g", pearson)),
    sprintf("\"residual_df\": %d", fit$df.residual),
    sprintf("\"r_iterations_informational\": %d", iterations),
    extra)
  if (length(profile_columns) > 0) {
    critical <- qnorm(0.975)
    mass_ci <- suppressWarnings(suppressMessages(
      confint(confint_fit, parm = profile_columns, level = 0.95)))
    mass_ci <- matrix(mass_ci, ncol = 2)
    exact <- t(sapply(profile_columns, function(j)
      exact_profile(X, y, w, o, fam, beta, se, deviance(fit), dispersion, j, critical)))
    fields <- c(fields,
      sprintf("\"profile_critical_value\": %s", sprintf("%.17g", critical)),
      sprintf("\"profile_columns\": %s", paste0("[", paste(profile_columns - 1, collapse = ", "), "]")),
      sprintf("\"profile_mass_confint\": %s", mat_json(mass_ci)),
      sprintf("\"profile_exact_uniroot\": %s", mat_json(exact)))
  }
  writeLines(c("{", paste0("  ", paste(fields, collapse = ",\n  ")), "}"),
             file.path(out_dir, paste0(name, ".json")))
  cat(sprintf("%-28s deviance %.10g  logLik %.10g  iter %d\n", name, deviance(fit),
              as.numeric(logLik(fit)), iterations))
}

## ---- binomial -------------------------------------------------------------------------
bw <- MASS::birthwt
bw$race <- factor(bw$race, labels = c("white", "black", "other"))
for (link in c("logit", "probit", "cloglog")) {
  fit0 <- glm(low ~ age + lwt + race + smoke, family = binomial(link), data = bw, control = tight)
  fit <- polish(fit0)
  emit(paste0("birthwt_", link), fit, "binomial", link, TRUE, iterations = fit0$iter,
       profile_columns = if (link == "logit") seq_along(coef(fit)) else c(2L, 6L))
}
for (link in c("logit", "probit", "cloglog")) {
  fit0 <- glm(vs ~ wt + hp, family = binomial(link), data = datasets::mtcars, control = tight)
  fit <- polish(fit0)
  ## No profile references for the probit and cloglog fits: some fitted probabilities sit where
  ## R clamps the inverse link (glm.fit warns "fitted probabilities numerically 0 or 1"), and
  ## there glm.fit's constrained refits can stop on the flat clamped part of the likelihood
  ## (checked with optim on the unclamped probit likelihood: at hp = -0.0978 glm.fit reports
  ## deviance 19.647 where the minimum over the other coefficients is 19.099).
  emit(paste0("mtcars_", link), fit, "binomial", link, TRUE, iterations = fit0$iter,
       profile_columns = if (link == "logit") 2:3 else integer(0))
}
## esoph: binomial totals (cases out of cases + controls) as proportions with prior weights.
es <- datasets::esoph
es$age_score <- as.numeric(es$agegp); es$alcohol_score <- as.numeric(es$alcgp)
es$tobacco_score <- as.numeric(es$tobgp)
fit0 <- glm(cbind(ncases, ncontrols) ~ age_score + alcohol_score + tobacco_score,
            family = binomial("logit"), data = es, control = tight)
fit <- polish(fit0)
emit("esoph_logit", fit, "binomial", "logit", TRUE, iterations = fit0$iter, profile_columns = 2:4)

## ---- Poisson with offset ------------------------------------------------------------
fit0 <- glm(Claims ~ District + Group + Age + offset(log(Holders)), family = poisson("log"),
            data = MASS::Insurance, control = tight)
fit <- polish(fit0)
emit("insurance_poisson", fit, "poisson", "log", TRUE, iterations = fit0$iter,
     profile_columns = seq_along(coef(fit)))
## Without an intercept R's null model is the offset alone (mu = exp(offset)).
fit0 <- glm(Claims ~ 0 + District + Group + Age + offset(log(Holders)), family = poisson("log"),
            data = MASS::Insurance, control = tight)
fit <- polish(fit0)
emit("insurance_poisson_no_intercept", fit, "poisson", "log", FALSE, iterations = fit0$iter,
     profile_columns = 1:2)
fit0 <- glm(breaks ~ wool + tension, family = poisson("log"), data = datasets::warpbreaks,
            control = tight)
fit <- polish(fit0)
emit("warpbreaks_poisson", fit, "poisson", "log", TRUE, iterations = fit0$iter,
     profile_columns = 2:4)

## ---- negative binomial (NB2, theta by ML) -------------------------------------------
## MASS::glm.nb stops its theta/beta alternation with theta.ml's default eps (~1.2e-4 on the
## Newton step), so its output is polished here with MASS's own pieces: alternate glm.fit with
## family negative.binomial(theta) (MASS) run to its fixed point and MASS::theta.ml with
## eps = 1e-14, until theta stops changing. The reference quantities are then those of the glm
## with theta fixed at the polished value (dispersion 1, as summary.negbin uses), whose logLik
## is the full NB log-likelihood (negative.binomial()$aic). glm.nb's own theta and SE are kept as
## "theta_glm_nb" and "theta_se_glm_nb"; MASS::confint is run on the glm.nb fit itself.
## theta SE ("theta_se"): sqrt(1 / observed information for theta) at the polished (theta, mu),
## the formula of MASS::theta.ml evaluated here by hand (theta.ml itself evaluates it one Newton
## step before its final theta).
theta_info <- function(th, mu, y, w) sum(w * (-trigamma(th + y) + trigamma(th) - 1/th +
                                               2/(mu + th) - (y + th)/(mu + th)^2))
polish_nb <- function(fit) {
  X <- model.matrix(fit); y <- fit$y; w <- fit$prior.weights
  o <- if (is.null(fit$offset)) rep(0, length(y)) else fit$offset
  beta <- coef(fit); th <- fit$theta
  for (k in 1:200) {
    g <- suppressWarnings(glm.fit(X, y, weights = w, offset = o, family = negative.binomial(th),
                                  start = beta, control = polish_control))
    beta <- g$coefficients
    th_new <- as.numeric(suppressWarnings(theta.ml(y, g$fitted.values, sum(w), w, limit = 100,
                                                   eps = 1e-14)))
    done <- abs(th_new - th) <= 1e-14 * th
    th <- th_new
    if (done) break
  }
  list(theta = th, beta = beta)
}
nb_fit0 <- glm.nb(Days ~ Eth + Sex + Age + Lrn, data = MASS::quine, control = tight)
nb_polished <- polish_nb(nb_fit0)
nb_fit <- suppressWarnings(glm(Days ~ Eth + Sex + Age + Lrn, data = MASS::quine,
                               family = negative.binomial(nb_polished$theta),
                               start = nb_polished$beta, control = polish_control))
nb_emit <- function(name, fit, fit0, th) {
  se_hand <- sqrt(1 / theta_info(th, fitted(fit), fit$y, fit$prior.weights))
  emit(name, fit, "negative_binomial", "log", TRUE, profile_columns = 2:3, iterations = fit0$iter,
       confint_fit = fit0, dispersion = 1,
       extra = c(sprintf("\"theta\": %.17g", th), sprintf("\"theta_se\": %.17g", se_hand),
                 sprintf("\"theta_glm_nb\": %.17g", fit0$theta),
                 sprintf("\"theta_se_glm_nb\": %.17g", fit0$SE.theta),
                 sprintf("\"log_likelihood_glm_nb\": %.17g", as.numeric(logLik(fit0)))))
}
nb_emit("quine_nb", nb_fit, nb_fit0, nb_polished$theta)
nb_fit0 <- glm.nb(breaks ~ wool + tension, data = datasets::warpbreaks, control = tight)
nb_polished <- polish_nb(nb_fit0)
nb_fit <- suppressWarnings(glm(breaks ~ wool + tension, data = datasets::warpbreaks,
                               family = negative.binomial(nb_polished$theta),
                               start = nb_polished$beta, control = polish_control))
nb_emit("warpbreaks_nb", nb_fit, nb_fit0, nb_polished$theta)

## ---- Gamma ----------------------------------------------------------------------------
## Clotting data typed in from the example section of R's ?glm (McCullagh & Nelder 1989, p. 300).
clotting <- data.frame(u = c(5, 10, 15, 20, 30, 40, 60, 80, 100),
                       lot1 = c(118, 58, 42, 35, 27, 25, 21, 19, 18),
                       lot2 = c(69, 35, 26, 21, 18, 16, 13, 12, 12))
clotting_long <- data.frame(u = rep(clotting$u, 2), time = c(clotting$lot1, clotting$lot2),
                            lot = factor(rep(c("lot1", "lot2"), each = 9)))
for (link in c("inverse", "log")) {
  fit0 <- glm(lot1 ~ log(u), family = Gamma(link), data = clotting, control = tight)
  fit <- polish(fit0)
  emit(paste0("clotting_lot1_", link), fit, "gamma", link, TRUE, iterations = fit0$iter,
       profile_columns = 1:2)
  fit0 <- glm(time ~ log(u) * lot, family = Gamma(link), data = clotting_long, control = tight)
  fit <- polish(fit0)
  emit(paste0("clotting_both_", link), fit, "gamma", link, TRUE, iterations = fit0$iter,
       profile_columns = 2:4)
  fit0 <- glm(Volume ~ log(Girth) + log(Height), family = Gamma(link), data = datasets::trees,
              control = tight)
  fit <- polish(fit0)
  emit(paste0("trees_", link), fit, "gamma", link, TRUE, iterations = fit0$iter,
       profile_columns = 2:3)
}

## ---- Firth (brglm2 AS_mean) for binomial logit ----------------------------------------
firth_emit <- function(name, formula, data) {
  fit <- glm(formula, family = binomial("logit"), data = data, method = "brglmFit",
             type = "AS_mean", epsilon = 1e-13, maxit = 500)
  X <- model.matrix(fit); y <- fit$y; w <- fit$prior.weights
  write_data(name, X, y, w, rep(0, length(y)))
  mu <- fitted(fit)
  info <- crossprod(X, X * (w * mu * (1 - mu)))
  loglik <- sum(w * (y * log(mu) + (1 - y) * log(1 - mu)))
  penalised <- loglik + 0.5 * as.numeric(determinant(info, logarithm = TRUE)$modulus)
  se <- sqrt(diag(solve(info)))
  fields <- c(
    sprintf("\"source\": %s", str_json(versions)),
    sprintf("\"name\": %s", str_json(name)),
    sprintf("\"coefficient_names\": [%s]", paste(str_json(names(coef(fit))), collapse = ", ")),
    sprintf("\"coefficients\": %s", num(coef(fit))),
    sprintf("\"standard_errors_brglm2\": %s", num(summary(fit)$coefficients[, "Std. Error"])),
    sprintf("\"standard_errors_by_hand\": %s", num(se)),
    sprintf("\"log_likelihood\": %s", sprintf("%.17g", loglik)),
    sprintf("\"penalised_log_likelihood\": %s", sprintf("%.17g", penalised)))
  writeLines(c("{", paste0("  ", paste(fields, collapse = ",\n  ")), "}"),
             file.path(out_dir, paste0(name, ".json")))
  cat(sprintf("%-28s penalised logLik %.10g\n", name, penalised))
}
## Endometrial cancer data of Heinze & Schemper (2002), shipped with brglm2; NV separates HG
## quasi-completely, so the ML estimate of its coefficient does not exist.
firth_emit("endometrial_firth", HG ~ NV + PI + EH, brglm2::endometrial)
firth_emit("birthwt_firth", low ~ age + lwt + race + smoke, bw)
## A constructed two-arm dataset (defined identically in tests/glm_failure_modes.rs) whose second
## arm has no events: the ML estimate of the arm effect does not exist, Firth's does.
i <- 0:39
arm_data <- data.frame(arm = i %% 2, covariate = ((i * 7) %% 11) / 10)
arm_data$y <- as.numeric(arm_data$arm == 0 & (i %% 3 == 0 | i %% 5 == 0))
firth_emit("arm_no_events_firth", y ~ arm + covariate, arm_data)
