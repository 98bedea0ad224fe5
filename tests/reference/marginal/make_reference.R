## Reference values for cairn's marginal (standardised) treatment effects
## (tests/marginal_reference.rs).
##
## Run from the crate root:   Rscript tests/reference/marginal/make_reference.R
##
## Everything here is computed by hand from stats::glm fits (no package for marginal effects or
## for clinical-trial analysis is used): the arm means by averaging predictions with the
## treatment columns of the model matrix reset, the delta-method Jacobian analytically (and
## checked against a central finite difference), and the robust variance from its moment formula
## written with R's cov() rescaled to divisor n. Every number is printed with sprintf("%.17g").
##
## Data: MASS::birthwt (Hosmer & Lemeshow; low ~ race + age + lwt + smoke, race as a 3-level
## "treatment" with white as the reference arm), datasets::warpbreaks (breaks ~ tension + wool,
## tension as a 3-level "treatment") and MASS::Insurance (Claims ~ District + Group + Age +
## offset(log(Holders)), District as a 4-level "treatment" with district 1 as reference).
## None is a randomised trial; they only exercise the arithmetic.
##
## Writes <name>_data.csv (response, offset, arm, model-matrix columns) and <name>.json.

suppressPackageStartupMessages(library(MASS))

out_dir <- file.path("tests", "reference", "marginal")
stopifnot(dir.exists(out_dir))
versions <- sprintf("%s; MASS %s", R.version.string, as.character(packageVersion("MASS")))
writeLines(versions, file.path(out_dir, "versions.txt"))
cat(versions, "\n")

tight <- glm.control(epsilon = 1e-14, maxit = 200)
critical <- qnorm(0.975)

num <- function(x) {
  if (length(x) == 0) return("[]")
  paste0("[", paste(sprintf("%.17g", as.numeric(x)), collapse = ", "), "]")
}
mat_json <- function(m) paste0("[", paste(apply(m, 1, num), collapse = ", "), "]")
f17 <- function(x) sprintf("%.17g", x)

## Covariance with divisor n (R's cov() uses n - 1).
cov_n <- function(x, y) { n <- length(x); cov(x, y) * (n - 1) / n }

write_data <- function(name, X, y, o, arm) {
  con <- file(file.path(out_dir, paste0(name, "_data.csv")), "w")
  writeLines(paste(c("response", "offset", "arm", colnames(X)), collapse = ","), con)
  for (i in seq_len(nrow(X))) {
    writeLines(paste(c(f17(y[i]), f17(o[i]), as.character(arm[i]), f17(X[i, ])), collapse = ","), con)
  }
  close(con)
}

## The analysis. `treatment` names the model-matrix column of each non-reference arm, in arm
## order (arm 0 is the reference). Returns the JSON text.
analyse <- function(name, fit, arm, treatment, scales, contrasts, variances) {
  X <- model.matrix(fit)
  y <- fit$y
  o <- if (is.null(fit$offset)) rep(0, nrow(X)) else fit$offset
  beta <- coef(fit)
  stopifnot(!anyNA(beta))
  vb <- vcov(fit)
  fam <- family(fit)
  n <- nrow(X)
  K <- length(treatment) + 1
  write_data(name, X, y, o, arm)

  ## Predictions under each arm: m[i, a] = g^{-1}(x_i(a)' beta + o_i), and the Jacobian of the
  ## arm means with respect to beta, D[a, ] = mean_i g^{-1}'(eta_i(a)) x_i(a).
  m <- matrix(0, n, K)
  D <- matrix(0, K, ncol(X))
  design_for <- function(a, b = beta) {
    Xa <- X
    Xa[, treatment] <- 0
    if (a > 0) Xa[, treatment[a]] <- 1
    Xa
  }
  for (a in 0:(K - 1)) {
    Xa <- design_for(a)
    eta <- drop(Xa %*% beta) + o
    m[, a + 1] <- fam$linkinv(eta)
    D[a + 1, ] <- colMeans(fam$mu.eta(eta) * Xa)
  }
  mu <- colMeans(m)

  ## Independent check of the analytic Jacobian by central differences.
  arm_means_at <- function(b) sapply(0:(K - 1), function(a) mean(fam$linkinv(drop(design_for(a) %*% b) + o)))
  D_numeric <- t(sapply(seq_along(beta), function(j) {
    h <- 1e-6 * max(1, abs(beta[j])); e <- replace(rep(0, length(beta)), j, h)
    (arm_means_at(beta + e) - arm_means_at(beta - e)) / (2 * h)
  }))
  stopifnot(max(abs(t(D_numeric) - D)) < 1e-7 * max(abs(D)))

  ## Ge et al. (2011): delta method conditional on the covariates.
  V_conditional <- D %*% vb %*% t(D)
  ## Adding the variability of the predictions across subjects (divisor n), valid when the
  ## model is correct.
  centred <- sweep(m, 2, mu)
  V_sampling <- V_conditional + crossprod(centred) / n^2
  ## Ye, Shao, Yi & Zhao (2023): moment form with residuals per arm, divisors n_a and n.
  V_robust <- matrix(0, K, K)
  for (a in 1:K) for (b in 1:K) {
    in_a <- arm == a - 1; in_b <- arm == b - 1
    term <- cov_n(y[in_a], m[in_a, b]) + cov_n(m[in_b, a], y[in_b]) - cov_n(m[, a], m[, b])
    if (a == b) {
      r <- y[in_a] - m[in_a, a]
      term <- term + cov_n(r, r) / (sum(in_a) / n)
      ## Prediction unbiasedness, which this formula needs (checked only where it is used).
      if ("robust" %in% variances) stopifnot(abs(mean(r)) < 1e-8)
    }
    V_robust[a, b] <- term / n
  }

  ## Influence function of the M-estimator (beta-hat, arm means): psi_ia = (m_ia - mu_a) +
  ## D_a B^{-1} s_i with s_i = x_i (y_i - mu_i) mu.eta(eta_i) / V(mu_i) and
  ## B = (1/n) sum_i x_i x_i' mu.eta(eta_i)^2 / V(mu_i); V = (1/n^2) sum_i psi_i psi_i'.
  eta_fit <- drop(X %*% beta) + o
  mu_fit <- fam$linkinv(eta_fit)
  d_fit <- fam$mu.eta(eta_fit)
  B <- crossprod(X, X * (d_fit^2 / fam$variance(mu_fit))) / n
  scores <- X * ((y - mu_fit) * d_fit / fam$variance(mu_fit))
  psi <- centred + scores %*% solve(B, t(D))
  V_influence <- crossprod(psi) / n^2

  effects_json <- function(V) {
    rows <- character(0)
    for (cc in contrasts) {
      a <- cc[1] + 1; b <- cc[2] + 1
      for (s in scales) {
        if (s == "difference") {
          est <- mu[a] - mu[b]; g <- c(1, -1); centre <- est
        } else if (s == "ratio") {
          est <- mu[a] / mu[b]; g <- c(1 / mu[a], -1 / mu[b]); centre <- log(est)
        } else {
          est <- (mu[a] / (1 - mu[a])) / (mu[b] / (1 - mu[b]))
          g <- c(1 / (mu[a] * (1 - mu[a])), -1 / (mu[b] * (1 - mu[b]))); centre <- log(est)
        }
        Vab <- V[c(a, b), c(a, b)]
        se <- sqrt(drop(t(g) %*% Vab %*% g))
        z <- centre / se
        lo <- centre - critical * se; hi <- centre + critical * se
        if (s != "difference") { lo <- exp(lo); hi <- exp(hi) }
        rows <- c(rows, sprintf(
          "{\"arm\": %d, \"versus\": %d, \"scale\": \"%s\", \"estimate\": %s, \"standard_error\": %s, \"lower\": %s, \"upper\": %s, \"statistic\": %s, \"p_value\": %s}",
          cc[1], cc[2], s, f17(est), f17(se), f17(lo), f17(hi), f17(z), f17(2 * pnorm(-abs(z)))))
      }
    }
    paste0("[\n      ", paste(rows, collapse = ",\n      "), "]")
  }
  variance_json <- function(V) sprintf("{\"covariance\": %s,\n    \"effects\": %s}", mat_json(V), effects_json(V))
  all_variances <- list(conditional_delta = V_conditional, delta_with_covariate_sampling = V_sampling,
                        robust = V_robust, influence_function = V_influence)
  parts <- sapply(variances, function(v) sprintf("\"%s\": %s", v, variance_json(all_variances[[v]])))
  treatment_index <- match(treatment, colnames(X)) - 1
  json <- paste0(
    "{\n  \"source\": \"", versions, "; by hand from stats::glm (make_reference.R)\",\n",
    "  \"family\": \"", fam$family, "\", \"link\": \"", fam$link, "\",\n",
    "  \"treatment_columns\": [null, ", paste(treatment_index, collapse = ", "), "],\n",
    "  \"critical_value\": ", f17(critical), ",\n",
    "  \"coefficients\": ", num(beta), ",\n",
    "  \"coefficient_covariance\": ", mat_json(vb), ",\n",
    "  \"means\": ", num(mu), ",\n",
    "  \"variances\": {\n  ", paste(parts, collapse = ",\n  "), "}\n}\n")
  writeLines(json, file.path(out_dir, paste0(name, ".json")))
  cat(name, ": means", f17(mu), "\n")
  invisible(all_variances)
}

## Binary: birthwt, logit and probit links.
bw <- MASS::birthwt
bw$race <- factor(bw$race, labels = c("white", "black", "other"))
arm_bw <- as.integer(bw$race) - 1
pairs3 <- list(c(1, 0), c(2, 0), c(2, 1))
fit_logit <- glm(low ~ race + age + lwt + smoke, family = binomial("logit"), data = bw, control = tight)
analyse("birthwt_logit", fit_logit, arm_bw, c("raceblack", "raceother"),
        c("difference", "ratio", "odds_ratio"), pairs3,
        c("conditional_delta", "delta_with_covariate_sampling", "robust", "influence_function"))
## Probit is not canonical, so residuals do not average to zero per arm and the robust moment
## formula does not apply; only the delta-method variances are referenced.
fit_probit <- glm(low ~ race + age + lwt + smoke, family = binomial("probit"), data = bw, control = tight)
analyse("birthwt_probit", fit_probit, arm_bw, c("raceblack", "raceother"),
        c("difference", "ratio", "odds_ratio"), pairs3,
        c("conditional_delta", "delta_with_covariate_sampling", "influence_function"))
## Treatment only: the identity case (means are the raw proportions).
fit_plain <- glm(low ~ race, family = binomial("logit"), data = bw, control = tight)
analyse("birthwt_treatment_only", fit_plain, arm_bw, c("raceblack", "raceother"),
        c("difference", "ratio", "odds_ratio"), pairs3,
        c("conditional_delta", "delta_with_covariate_sampling", "robust", "influence_function"))

## Count without exposure: warpbreaks, Poisson log link, tension (L, M, H) as a 3-level
## "treatment" with L as reference and wool as the covariate. The layout is balanced (9 looms per
## tension and wool), so the covariate is independent of the arm, as randomisation makes it.
wb <- datasets::warpbreaks
arm_wb <- as.integer(wb$tension) - 1
fit_wb <- glm(breaks ~ tension + wool, family = poisson, data = wb, control = tight)
analyse("warpbreaks_poisson", fit_wb, arm_wb, c("tensionM", "tensionH"),
        c("difference", "ratio"), pairs3,
        c("conditional_delta", "delta_with_covariate_sampling", "robust", "influence_function"))

## Count with exposure: Insurance, Poisson log link, offset log(Holders), District as a 4-level
## "treatment". The rows are cells whose exposure differs by district (not randomised), and the
## robust moment formula gives a matrix with negative eigenvalues here, so only the delta-method
## variances are referenced; the Rust test checks that the robust variance is refused.
ins <- MASS::Insurance
arm_ins <- as.integer(ins$District) - 1
fit_pois <- glm(Claims ~ District + Group + Age + offset(log(Holders)), family = poisson,
                data = ins, control = tight)
insurance <- analyse("insurance_poisson", fit_pois, arm_ins, c("District2", "District3", "District4"),
        c("difference", "ratio"), list(c(1, 0), c(2, 0), c(3, 0), c(3, 1)),
        c("conditional_delta", "delta_with_covariate_sampling", "influence_function"))
cat("insurance_poisson: diagonal of the robust moment formula (not stored):",
    f17(diag(insurance$robust)), "\n")
