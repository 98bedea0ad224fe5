# Reference values for tests/plan_level_reference.rs: whole plans (plan -> data -> design -> fit
# -> results.json) for every nonlinear model family, against R on public datasets that ship with
# R's recommended packages. For each case <name> this script writes, next to itself:
#   <name>_subjects.csv    the blinded subjects file (USUBJID = row number, no treatment column)
#   <name>_allocation.csv  USUBJID and the factor that plays the treatment
#   <name>_reference.json  R's results: coefficients in cairn's design order, the planned
#                          contrasts (arm minus versus; a pair of non-reference arms is the
#                          difference of their coefficients with its SE from vcov), exp() of every
#                          contrast with Wald limits, the Wald chi-square of the treatment terms
#                          (computed by hand from vcov), the likelihood-ratio test of treatment
#                          (2 * difference of log-likelihoods of nested fits), and per family
#                          extras (standardised risk difference, theta, proportional-odds LR tests)
# Every number is written with sprintf("%.17g") so that it reads back to the same double; the R
# and package versions are written into every JSON file.
#
# Cases:
#   birthwt_logit          MASS::birthwt, binomial logit: low ~ race + age + lwt + smoke(stratum),
#                          with a population flag and missing covariate values (complete cases)
#   insurance_poisson      MASS::Insurance, Poisson log link: Claims ~ Age + District + Group
#                          (stratum) + offset(log(Holders)); the reference arm is the LAST level
#   quine_negbin           MASS::quine, negative binomial (NB2): Days ~ Age + Sex + Lrn + Eth
#                          (stratum); the reference arm is the SECOND level
#   housing_cumulative     MASS::housing expanded to one row per respondent, cumulative logit:
#                          Sat ~ Infl + Cont + Type (stratum, Atrium and Terrace pooled)
#   housing_multinomial    the same rows, baseline-category logit with Sat as nominal and
#                          reference category Medium (not the first level, so the plan's
#                          reference-category key is exercised); datasets::iris was not used
#                          because it has no treatment-like factor besides its outcome
#
# Run from anywhere:  Rscript tests/reference/plan_level/make_reference.R

suppressPackageStartupMessages({
  library(MASS)
  library(ordinal)
  library(nnet)
})

script_argument <- grep("^--file=", commandArgs(trailingOnly = FALSE), value = TRUE)
output_folder <- if (length(script_argument) == 1) {
  dirname(normalizePath(sub("^--file=", "", script_argument)))
} else {
  getwd()
}

versions <- list(
  r_version = R.version.string,
  stats_version = as.character(packageVersion("stats")),
  mass_version = as.character(packageVersion("MASS")),
  ordinal_version = as.character(packageVersion("ordinal")),
  nnet_version = as.character(packageVersion("nnet"))
)
version_line <- sprintf("%s; MASS %s; ordinal %s; nnet %s", R.version.string, versions$mass_version,
                        versions$ordinal_version, versions$nnet_version)
cat(version_line, "\n")
writeLines(version_line, file.path(output_folder, "versions.txt"))

# ---- a minimal JSON writer with full double precision -------------------------------------
json_string <- function(x) {
  x <- gsub("\\\\", "\\\\\\\\", x)
  x <- gsub("\"", "\\\\\"", x)
  paste0("\"", x, "\"")
}
json_value <- function(x, indent = "") {
  inner <- paste0(indent, "  ")
  if (is.null(x)) return("null")
  if (is.list(x)) {
    if (length(x) == 0) return(if (is.null(names(x))) "[]" else "{}")
    if (!is.null(names(x))) {
      items <- vapply(names(x), function(key) {
        paste0(inner, json_string(key), ": ", json_value(x[[key]], inner))
      }, character(1))
      return(paste0("{\n", paste(items, collapse = ",\n"), "\n", indent, "}"))
    }
    items <- vapply(x, function(item) paste0(inner, json_value(item, inner)), character(1))
    return(paste0("[\n", paste(items, collapse = ",\n"), "\n", indent, "]"))
  }
  if (length(x) != 1) stop("json_value: vectors must be wrapped with as.list()")
  if (is.character(x)) return(json_string(x))
  if (is.logical(x)) return(if (x) "true" else "false")
  if (is.integer(x)) return(as.character(x))
  if (!is.finite(x)) stop("non-finite number in reference output")
  sprintf("%.17g", x)
}
write_json <- function(values, name) {
  writeLines(json_value(c(values, versions)), file.path(output_folder, paste0(name, "_reference.json")),
             sep = "\n", useBytes = TRUE)
}

# Numeric cells are written so that they parse back to the same double; NA is the empty cell.
cell_text <- function(column) {
  text <- if (is.numeric(column) && !is.integer(column)) {
    out <- as.character(column)
    inexact <- !is.na(column) & as.numeric(ifelse(is.na(column), "0", out)) != column
    out[inexact] <- sprintf("%.17g", column[inexact])
    out
  } else as.character(column)
  text[is.na(column)] <- ""
  text
}
write_csv <- function(data, path) {
  for (column in names(data)) {
    if (is.character(data[[column]])) stopifnot(!any(grepl("[,\"\n]", data[[column]]), na.rm = TRUE))
  }
  lines <- c(paste(names(data), collapse = ","), do.call(paste, c(lapply(data, cell_text), sep = ",")))
  writeLines(lines, path, sep = "\n", useBytes = TRUE)
}
# The subjects file gets every column but the treatment; the allocation file the key and treatment.
write_study <- function(name, data, treatment) {
  stopifnot(names(data)[1] == "USUBJID")
  write_csv(data[, setdiff(names(data), treatment), drop = FALSE],
            file.path(output_folder, paste0(name, "_subjects.csv")))
  write_csv(data[, c("USUBJID", treatment)], file.path(output_folder, paste0(name, "_allocation.csv")))
}

z <- qnorm(0.975)
# A contrast L'b with its SE from the covariance V, as a Wald estimate with 95% limits and the
# exponentiated estimate and limits.
contrast_entry <- function(arm, versus, category, weights, b, V) {
  estimate <- sum(weights * b)
  se <- sqrt(drop(t(weights) %*% V %*% weights))
  statistic <- estimate / se
  list(arm = arm, versus = versus, category = category,
       estimate = estimate, std_error = se, statistic = statistic,
       p_value = 2 * pnorm(-abs(statistic)),
       lower = estimate - z * se, upper = estimate + z * se,
       ratio = exp(estimate), ratio_lower = exp(estimate - z * se), ratio_upper = exp(estimate + z * se))
}
# Weights on the coefficient vector for arm minus versus under treatment coding: the reference
# arm has no column; `columns` maps arm code -> coefficient position.
pair_weights <- function(arm, versus, columns, n_parameters) {
  w <- numeric(n_parameters)
  if (!is.null(columns[[arm]])) w[columns[[arm]]] <- w[columns[[arm]]] + 1
  if (!is.null(columns[[versus]])) w[columns[[versus]]] <- w[columns[[versus]]] - 1
  w
}
# Wald chi-square of the coefficients at `positions`: b' V^-1 b, by hand.
wald_test <- function(b, V, positions) {
  bt <- b[positions]
  statistic <- drop(t(bt) %*% solve(V[positions, positions, drop = FALSE], bt))
  list(statistic = statistic, df = length(positions),
       p_value = pchisq(statistic, length(positions), lower.tail = FALSE))
}
lr_test <- function(log_likelihood_full, log_likelihood_reduced, df) {
  statistic <- 2 * (log_likelihood_full - log_likelihood_reduced)
  list(statistic = statistic, df = df, p_value = pchisq(statistic, df, lower.tail = FALSE))
}
coefficient_entries <- function(cairn_names, r_names, b, V) {
  stopifnot(length(cairn_names) == length(b), length(r_names) == length(b))
  lapply(seq_along(b), function(i) list(cairn_name = cairn_names[i], r_name = r_names[i],
                                        estimate = unname(b[i]), std_error = sqrt(V[i, i])))
}

tight <- glm.control(epsilon = 1e-14, maxit = 200)
polish_control <- glm.control(epsilon = 1e-300, maxit = 100)
# glm stops on its relative deviance change; a few more IRLS steps from its own estimate take
# the coefficients to the fixed point (the warning about reaching maxit is expected).
polish <- function(fit) suppressWarnings(update(fit, start = coef(fit), control = polish_control))

# ---- 1. binomial logit: MASS::birthwt --------------------------------------------------------
# Treatment: race (white = reference, black, other). Covariates age, lwt; stratum smoke. The
# endpoint LOWBW has levels [normal, low] with event "low" (the SECOND declared level is not the
# event by position: the plan's event key decides). Population flag FASFL = N for subjects 5 and
# 15, and lwt missing for subjects 10, 20 and 30, so 184 subjects are analysed.
bw <- MASS::birthwt
bw_study <- data.frame(
  USUBJID = seq_len(nrow(bw)),
  FASFL = ifelse(seq_len(nrow(bw)) %in% c(5, 15), "N", "Y"),
  LOWBW = ifelse(bw$low == 1, "low", "normal"),
  AGE = as.numeric(bw$age),
  LWT = as.numeric(bw$lwt),
  SMOKE = ifelse(bw$smoke == 1, "yes", "no"),
  RACE = c("white", "black", "other")[bw$race],
  stringsAsFactors = FALSE)
bw_study$LWT[c(10, 20, 30)] <- NA
write_study("birthwt_logit", bw_study, "RACE")
bw_data <- subset(bw_study, FASFL == "Y" & !is.na(LWT))
bw_data$RACE <- factor(bw_data$RACE, levels = c("white", "black", "other"))
bw_data$SMOKE <- factor(bw_data$SMOKE, levels = c("no", "yes"))
bw_data$event <- as.numeric(bw_data$LOWBW == "low")
bw_fit <- polish(glm(event ~ RACE + AGE + LWT + SMOKE, family = binomial("logit"), data = bw_data,
                     control = tight))
bw_reduced <- polish(glm(event ~ AGE + LWT + SMOKE, family = binomial("logit"), data = bw_data,
                         control = tight))
bw_b <- coef(bw_fit); bw_V <- vcov(bw_fit)
bw_columns <- list(black = 2, other = 3)
bw_pairs <- list(c("black", "white"), c("other", "white"), c("other", "black"))
# Standardised risks: predictions averaged over the analysed subjects with race set to each arm.
bw_risk <- sapply(levels(bw_data$RACE), function(level) {
  counterfactual <- bw_data
  counterfactual$RACE <- factor(rep(level, nrow(bw_data)), levels = levels(bw_data$RACE))
  mean(predict(bw_fit, newdata = counterfactual, type = "response"))
})
write_json(list(
  case = "birthwt_logit",
  source = "MASS::birthwt; stats::glm(event ~ RACE + AGE + LWT + SMOKE, binomial(logit))",
  n_analysed = nrow(bw_data),
  coefficients = coefficient_entries(
    c("(intercept)", "treatment = black", "treatment = other", "AGE", "LWT", "SMOKE = yes"),
    names(bw_b), bw_b, bw_V),
  contrasts = lapply(bw_pairs, function(p) contrast_entry(p[1], p[2], NULL,
                                                          pair_weights(p[1], p[2], bw_columns, length(bw_b)), bw_b, bw_V)),
  wald = wald_test(bw_b, bw_V, 2:3),
  likelihood_ratio = lr_test(as.numeric(logLik(bw_fit)), as.numeric(logLik(bw_reduced)), 2L),
  deviance = deviance(bw_fit),
  log_likelihood = as.numeric(logLik(bw_fit)),
  standardised_risks = lapply(names(bw_risk), function(level) list(arm = level, mean = unname(bw_risk[level]))),
  risk_differences = lapply(bw_pairs, function(p) list(arm = p[1], versus = p[2],
                                                      estimate = unname(bw_risk[p[1]] - bw_risk[p[2]])))
), "birthwt_logit")

# ---- 2. Poisson with exposure: MASS::Insurance -----------------------------------------------
# Treatment: Age (policyholder's age group) as a plain unordered factor, plan order
# [age-u25, age-25-29, age-30-35, age-o35] with reference age-o35 (the last), so the indicator
# columns are the first three arms in plan order. District is a factor covariate, Group (engine
# size) a stratum, Holders the exposure. No row has Holders == 0.
ins <- MASS::Insurance
stopifnot(all(ins$Holders > 0))
age_codes <- c("age-u25", "age-25-29", "age-30-35", "age-o35")
ins_study <- data.frame(
  USUBJID = seq_len(nrow(ins)),
  ALLFL = "Y",
  CLAIMS = as.integer(ins$Claims),
  HOLDERS = as.numeric(ins$Holders),
  DISTRICT = paste0("D", as.integer(ins$District)),
  GROUP = paste0("G", as.integer(ins$Group)),
  AGEGRP = age_codes[as.integer(ins$Age)],
  stringsAsFactors = FALSE)
write_study("insurance_poisson", ins_study, "AGEGRP")
ins_data <- ins_study
ins_data$AGEGRP <- factor(ins_data$AGEGRP, levels = c("age-o35", age_codes[1:3]))
ins_data$DISTRICT <- factor(ins_data$DISTRICT, levels = paste0("D", 1:4))
ins_data$GROUP <- factor(ins_data$GROUP, levels = paste0("G", 1:4))
ins_fit <- polish(glm(CLAIMS ~ AGEGRP + DISTRICT + GROUP + offset(log(HOLDERS)), family = poisson,
                      data = ins_data, control = tight))
ins_reduced <- polish(glm(CLAIMS ~ DISTRICT + GROUP + offset(log(HOLDERS)), family = poisson,
                          data = ins_data, control = tight))
ins_b <- coef(ins_fit); ins_V <- vcov(ins_fit)
ins_columns <- list("age-u25" = 2, "age-25-29" = 3, "age-30-35" = 4)
# The plan asks for all-pairs: each later arm in plan order minus each earlier one.
ins_pairs <- list()
for (versus in 1:3) for (arm in (versus + 1):4) ins_pairs[[length(ins_pairs) + 1]] <- age_codes[c(arm, versus)]
write_json(list(
  case = "insurance_poisson",
  source = "MASS::Insurance; stats::glm(CLAIMS ~ AGEGRP + DISTRICT + GROUP + offset(log(HOLDERS)), poisson)",
  n_analysed = nrow(ins_data),
  coefficients = coefficient_entries(
    c("(intercept)", paste("treatment =", age_codes[1:3]), paste("DISTRICT =", paste0("D", 2:4)),
      paste("GROUP =", paste0("G", 2:4))),
    names(ins_b), ins_b, ins_V),
  contrasts = lapply(ins_pairs, function(p) contrast_entry(p[1], p[2], NULL,
                                                           pair_weights(p[1], p[2], ins_columns, length(ins_b)), ins_b, ins_V)),
  wald = wald_test(ins_b, ins_V, 2:4),
  likelihood_ratio = lr_test(as.numeric(logLik(ins_fit)), as.numeric(logLik(ins_reduced)), 3L),
  deviance = deviance(ins_fit),
  log_likelihood = as.numeric(logLik(ins_fit))
), "insurance_poisson")

# ---- 3. negative binomial: MASS::quine -------------------------------------------------------
# Treatment: Age (F0..F3) with reference F1 (the second level), so the indicator columns are
# F0, F2, F3 in plan order. Covariates Sex and Lrn (factors), stratum Eth. MASS::glm.nb stops its
# theta/beta alternation at theta.ml's default tolerance (~1.2e-4 on the Newton step), so the fit
# is polished with MASS's own pieces: glm.fit with family negative.binomial(theta) run to its
# fixed point and MASS::theta.ml with eps = 1e-14, alternated until theta stops changing. The
# reference values are those of the glm with theta fixed at the polished value (dispersion 1, as
# summary.negbin uses); its logLik is the full NB log-likelihood. The reduced model (no Age)
# re-estimates theta the same way, as anova.negbin does.
theta_information <- function(theta, mu, y) sum(-trigamma(theta + y) + trigamma(theta) - 1 / theta +
                                                   2 / (mu + theta) - (y + theta) / (mu + theta)^2)
polish_nb <- function(formula, data) {
  start <- glm.nb(formula, data = data, control = tight)
  X <- model.matrix(start); y <- start$y
  beta <- coef(start); theta <- start$theta
  for (k in 1:200) {
    g <- suppressWarnings(glm.fit(X, y, family = negative.binomial(theta), start = beta,
                                  control = polish_control))
    beta <- g$coefficients
    theta_new <- as.numeric(suppressWarnings(theta.ml(y, g$fitted.values, length(y), limit = 100, eps = 1e-14)))
    done <- abs(theta_new - theta) <= 1e-14 * theta
    theta <- theta_new
    if (done) break
  }
  fit <- suppressWarnings(glm(formula, data = data, family = negative.binomial(theta), start = beta,
                              control = polish_control))
  list(fit = fit, theta = theta, glm_nb = start,
       theta_se = sqrt(1 / theta_information(theta, fitted(fit), fit$y)))
}
quine_study <- data.frame(
  USUBJID = seq_len(nrow(MASS::quine)),
  ALLFL = "Y",
  DAYS = as.integer(MASS::quine$Days),
  SEX = as.character(MASS::quine$Sex),
  LRN = as.character(MASS::quine$Lrn),
  ETH = as.character(MASS::quine$Eth),
  AGE = as.character(MASS::quine$Age),
  stringsAsFactors = FALSE)
write_study("quine_negbin", quine_study, "AGE")
quine_data <- quine_study
quine_data$AGE <- factor(quine_data$AGE, levels = c("F1", "F0", "F2", "F3"))
quine_data$SEX <- factor(quine_data$SEX, levels = c("F", "M"))
quine_data$LRN <- factor(quine_data$LRN, levels = c("AL", "SL"))
quine_data$ETH <- factor(quine_data$ETH, levels = c("A", "N"))
nb_full <- polish_nb(DAYS ~ AGE + SEX + LRN + ETH, quine_data)
nb_reduced <- polish_nb(DAYS ~ SEX + LRN + ETH, quine_data)
nb_b <- coef(nb_full$fit); nb_V <- vcov(nb_full$fit, dispersion = 1)
nb_columns <- list(F0 = 2, F2 = 3, F3 = 4)
quine_codes <- c("F0", "F1", "F2", "F3")
nb_pairs <- list()
for (versus in 1:3) for (arm in (versus + 1):4) nb_pairs[[length(nb_pairs) + 1]] <- quine_codes[c(arm, versus)]
# anova.negbin's LR statistic on glm.nb's own fits, as a cross-check of the polished one.
nb_anova <- anova(nb_reduced$glm_nb, nb_full$glm_nb)
write_json(list(
  case = "quine_negbin",
  source = "MASS::quine; MASS::glm.nb(DAYS ~ AGE + SEX + LRN + ETH), polished with MASS::theta.ml and glm.fit(negative.binomial(theta))",
  n_analysed = nrow(quine_data),
  coefficients = coefficient_entries(
    c("(intercept)", "treatment = F0", "treatment = F2", "treatment = F3", "SEX = M", "LRN = SL", "ETH = N"),
    names(nb_b), nb_b, nb_V),
  contrasts = lapply(nb_pairs, function(p) contrast_entry(p[1], p[2], NULL,
                                                          pair_weights(p[1], p[2], nb_columns, length(nb_b)), nb_b, nb_V)),
  wald = wald_test(nb_b, nb_V, 2:4),
  likelihood_ratio = lr_test(as.numeric(logLik(nb_full$fit)), as.numeric(logLik(nb_reduced$fit)), 3L),
  likelihood_ratio_anova_negbin = nb_anova$`LR stat.`[2],
  theta = nb_full$theta,
  theta_se = nb_full$theta_se,
  log_likelihood = as.numeric(logLik(nb_full$fit))
), "quine_negbin")

# ---- 4. cumulative logit: MASS::housing, one row per respondent --------------------------------
# Sat (Low < Medium < High) ~ Infl (treatment, reference Low) + Cont (factor covariate) + Type
# (stratum). The plan pools strata levels with fewer than 300 respondents (Atrium 239,
# Terrace 277) into one level "pooled-types" placed last, so R's Type has levels
# Tower, Apartment, pooled-types. ordinal::clm and cairn both model logit P(Y <= j) = theta_j - eta.
housing_rows <- MASS::housing[rep(seq_len(nrow(MASS::housing)), MASS::housing$Freq), ]
housing_study <- data.frame(
  USUBJID = seq_len(nrow(housing_rows)),
  ALLFL = "Y",
  SAT = as.character(housing_rows$Sat),
  CONT = as.character(housing_rows$Cont),
  TYPE = as.character(housing_rows$Type),
  INFL = as.character(housing_rows$Infl),
  stringsAsFactors = FALSE)
# Both housing cases share one study folder (housing_subjects.csv, housing_allocation.csv).
write_study("housing", housing_study, "INFL")
housing_data <- housing_study
housing_data$SAT <- factor(housing_data$SAT, levels = c("Low", "Medium", "High"), ordered = TRUE)
housing_data$INFL <- factor(housing_data$INFL, levels = c("Low", "Medium", "High"))
housing_data$CONT <- factor(housing_data$CONT, levels = c("Low", "High"))
housing_data$TYPE_POOLED <- factor(ifelse(housing_data$TYPE %in% c("Atrium", "Terrace"), "pooled-types", housing_data$TYPE),
                                   levels = c("Tower", "Apartment", "pooled-types"))
clm_control <- clm.control(gradTol = 1e-12, relTol = 1e-14, maxIter = 500L)
clm_fit <- clm(SAT ~ INFL + CONT + TYPE_POOLED, data = housing_data, link = "logit", control = clm_control)
clm_reduced <- clm(SAT ~ CONT + TYPE_POOLED, data = housing_data, link = "logit", control = clm_control)
clm_b <- c(clm_fit$alpha, clm_fit$beta); clm_V <- vcov(clm_fit)
stopifnot(identical(names(clm_b), rownames(clm_V)))
# Positions in (cut-points, beta): two cut-points first.
clm_columns <- list(Medium = 3, High = 4)
clm_pairs <- list(c("Medium", "Low"), c("High", "Low"), c("High", "Medium"))
# Proportional-odds check per term: LR of the clm in which the term's effect varies by cut-point
# (nominal = ~ term) against the proportional-odds fit, both with tight tolerances; and
# ordinal::nominal_test (clm's default tolerances) as a cross-check. coef() of a nominal fit
# lists the term's common effects as NA (aliased), so they are not counted in the df.
po_row <- function(term, cairn_term) {
  nominal_fit <- suppressWarnings(clm(SAT ~ INFL + CONT + TYPE_POOLED, nominal = as.formula(paste("~", term)),
                                      data = housing_data, link = "logit", control = clm_control))
  c(list(term = cairn_term), lr_test(as.numeric(logLik(nominal_fit)), as.numeric(logLik(clm_fit)),
                                     sum(!is.na(coef(nominal_fit))) - length(coef(clm_fit))))
}
nominal_table <- nominal_test(clm(SAT ~ INFL + CONT + TYPE_POOLED, data = housing_data))
print(nominal_table)
write_json(list(
  case = "housing_cumulative",
  source = "MASS::housing expanded by Freq; ordinal::clm(SAT ~ INFL + CONT + TYPE_POOLED, link = logit)",
  n_analysed = nrow(housing_data),
  coefficients = coefficient_entries(
    c("cut-point Low | Medium", "cut-point Medium | High", "treatment = Medium", "treatment = High",
      "CONT = High", "TYPE = Apartment", "TYPE = pooled-types"),
    names(clm_b), clm_b, clm_V),
  contrasts = lapply(clm_pairs, function(p) contrast_entry(p[1], p[2], NULL,
                                                           pair_weights(p[1], p[2], clm_columns, length(clm_b)), clm_b, clm_V)),
  wald = wald_test(clm_b, clm_V, 3:4),
  likelihood_ratio = lr_test(as.numeric(logLik(clm_fit)), as.numeric(logLik(clm_reduced)), 2L),
  log_likelihood = as.numeric(logLik(clm_fit)),
  proportional_odds = list(po_row("INFL", "treatment"), po_row("CONT", "CONT"), po_row("TYPE_POOLED", "TYPE")),
  pooled_levels = lapply(c("Atrium", "Terrace"), function(level) list(level = level,
                                                                      subjects = sum(housing_data$TYPE == level))),
  nominal_test_lrt = list(INFL = nominal_table["INFL", "LRT"], CONT = nominal_table["CONT", "LRT"],
                          TYPE = nominal_table["TYPE_POOLED", "LRT"])
), "housing_cumulative")

# ---- 5. baseline-category logit: the same housing rows, Sat nominal --------------------------
# log(P(Y = k) / P(Y = Medium)) = x'beta_k for k in Low, High; Infl treatment (reference Low),
# Cont covariate, Type stratum (four levels, no pooling). nnet::multinom stops at its optimiser's
# tolerance (about 1e-6 relative on these data), so its estimate is the start of a Newton-Raphson
# polish by hand with the analytic gradient and Hessian of the log-likelihood; the covariance is
# the inverse of the observed information at the polished maximum.
multinomial_newton <- function(X, y, categories, reference, start) {
  others <- setdiff(categories, reference)
  p <- ncol(X); K <- length(others)
  Y <- sapply(others, function(k) as.numeric(y == k))
  beta <- as.vector(start)   # category-major: column block per non-reference category
  log_likelihood <- function(beta) {
    eta <- X %*% matrix(beta, p, K)
    sum(Y * eta) - sum(log1p(rowSums(exp(eta))))
  }
  for (iteration in 1:100) {
    B <- matrix(beta, p, K)
    eta <- X %*% B
    P <- exp(eta) / (1 + rowSums(exp(eta)))
    gradient <- as.vector(crossprod(X, Y - P))
    information <- matrix(0, p * K, p * K)
    for (k in 1:K) for (l in 1:K) {
      w <- P[, k] * ((k == l) - P[, l])
      information[(k - 1) * p + 1:p, (l - 1) * p + 1:p] <- crossprod(X, X * w)
    }
    step <- solve(information, gradient)
    beta <- beta + step
    if (max(abs(step)) < 1e-15 * max(1, max(abs(beta)))) break
  }
  B <- matrix(beta, p, K)
  eta <- X %*% B
  P <- exp(eta) / (1 + rowSums(exp(eta)))
  information <- matrix(0, p * K, p * K)
  for (k in 1:K) for (l in 1:K) {
    w <- P[, k] * ((k == l) - P[, l])
    information[(k - 1) * p + 1:p, (l - 1) * p + 1:p] <- crossprod(X, X * w)
  }
  list(beta = beta, covariance = solve(information), log_likelihood = log_likelihood(beta),
       max_abs_gradient = max(abs(crossprod(X, Y - P))), others = others, iterations = iteration)
}
mn_data <- housing_data
mn_data$SAT <- relevel(factor(as.character(mn_data$SAT), levels = c("Low", "Medium", "High")), ref = "Medium")
mn_data$TYPE <- factor(mn_data$TYPE, levels = c("Tower", "Apartment", "Atrium", "Terrace"))
mn_start <- multinom(SAT ~ INFL + CONT + TYPE, data = mn_data, reltol = 1e-14, maxit = 10000, trace = FALSE)
mn_start_reduced <- multinom(SAT ~ CONT + TYPE, data = mn_data, reltol = 1e-14, maxit = 10000, trace = FALSE)
stopifnot(identical(rownames(coef(mn_start)), c("Low", "High")))
X_full <- model.matrix(~ INFL + CONT + TYPE, mn_data)
X_reduced <- model.matrix(~ CONT + TYPE, mn_data)
mn_full <- multinomial_newton(X_full, as.character(mn_data$SAT), c("Low", "Medium", "High"), "Medium", t(coef(mn_start)))
mn_reduced <- multinomial_newton(X_reduced, as.character(mn_data$SAT), c("Low", "Medium", "High"), "Medium", t(coef(mn_start_reduced)))
stopifnot(identical(mn_full$others, c("Low", "High")))
cat("multinomial: max |gradient|", mn_full$max_abs_gradient, "; nnet log-likelihood", as.numeric(logLik(mn_start)),
    "; polished", mn_full$log_likelihood, "\n")
mn_p <- ncol(X_full)
mn_names <- c("(intercept)", "treatment = Medium", "treatment = High", "CONT = High",
              "TYPE = Apartment", "TYPE = Atrium", "TYPE = Terrace")
mn_pairs <- list(c("Medium", "Low"), c("High", "Low"), c("High", "Medium"))
mn_contrasts <- list()
for (pair in mn_pairs) for (position in 1:2) {
  w <- numeric(2 * mn_p)
  columns <- list(Medium = 2, High = 3)
  w[(position - 1) * mn_p + seq_len(mn_p)] <- pair_weights(pair[1], pair[2], columns, mn_p)
  mn_contrasts[[length(mn_contrasts) + 1]] <- contrast_entry(pair[1], pair[2], mn_full$others[position], w,
                                                             mn_full$beta, mn_full$covariance)
}
mn_entries <- coefficient_entries(rep(mn_names, 2), paste(rep(mn_full$others, each = mn_p), colnames(X_full), sep = ":"),
                                  mn_full$beta, mn_full$covariance)
for (i in seq_along(mn_entries)) mn_entries[[i]]$category <- mn_full$others[(i - 1) %/% mn_p + 1]
write_json(list(
  case = "housing_multinomial",
  source = "MASS::housing expanded by Freq; baseline-category logit, nnet::multinom polished by Newton-Raphson in R",
  n_analysed = nrow(mn_data),
  coefficients = mn_entries,
  contrasts = mn_contrasts,
  wald = wald_test(mn_full$beta, mn_full$covariance, c(2, 3, mn_p + 2, mn_p + 3)),
  likelihood_ratio = lr_test(mn_full$log_likelihood, mn_reduced$log_likelihood, 4L),
  log_likelihood = mn_full$log_likelihood,
  log_likelihood_nnet = as.numeric(logLik(mn_start))
), "housing_multinomial")
