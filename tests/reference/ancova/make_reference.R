# Reference values for cairn's linear model (ANCOVA) tests, computed with R's
# lm() (stats package) on two datasets that ship with R. This script writes,
# for each dataset <name>:
#   <name>.csv             the analysed data (one row per subject, USUBJID = row number)
#   <name>_reference.json  coefficients, residual SD, R², the F test of the
#                          three-level factor given the other terms, adjusted
#                          means with delta-method SEs, and one pairwise contrast
# Every number is written with sprintf("%.17g") so that it round-trips to the
# same double. The R and package versions are written into every JSON file.
#
# Run from anywhere:  Rscript tests/reference/ancova/make_reference.R
# (the script writes next to itself).

suppressPackageStartupMessages(library(MASS))

script_argument <- grep("^--file=", commandArgs(trailingOnly = FALSE), value = TRUE)
output_folder <- if (length(script_argument) == 1) {
  dirname(normalizePath(sub("^--file=", "", script_argument)))
} else {
  getwd()
}

versions <- list(
  r_version = R.version.string,
  stats_version = as.character(packageVersion("stats")),
  mass_version = as.character(packageVersion("MASS"))
)

# ---- a minimal JSON writer with full double precision -------------------
json_string <- function(x) {
  x <- gsub("\\\\", "\\\\\\\\", x)
  x <- gsub("\"", "\\\\\"", x)
  paste0("\"", x, "\"")
}
json_value <- function(x, indent = "") {
  inner <- paste0(indent, "  ")
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

# Writes a numeric column so that it parses back to the same double.
exact_text <- function(x) {
  text <- as.character(x)
  stopifnot(identical(as.numeric(text), x))
  text
}

write_dataset_csv <- function(data, path) {
  for (column in names(data)) {
    if (is.character(data[[column]])) stopifnot(!any(grepl("[,\"\n]", data[[column]])))
  }
  text_columns <- lapply(data, function(column) {
    if (is.numeric(column) && !is.integer(column)) exact_text(column) else as.character(column)
  })
  lines <- c(paste(names(data), collapse = ","),
             do.call(paste, c(text_columns, sep = ",")))
  writeLines(lines, path, sep = "\n", useBytes = TRUE)
}

# ---- the reference computation ------------------------------------------
# fit:            the lm fit of the full model
# factor_name:    the three-level factor whose test, adjusted means and contrast are wanted
# contrast_pair:  c(level, versus) for the pairwise contrast level - versus
reference_values <- function(name, description, fit, data, factor_name, contrast_pair,
                             covariates, blocking_factors) {
  coefficient_table <- summary(fit)$coefficients
  design_columns <- colnames(model.matrix(fit))
  stopifnot(identical(rownames(coefficient_table), design_columns))  # no aliased column
  coefficients <- lapply(seq_along(design_columns), function(index) list(
    name = design_columns[index],
    estimate = coefficient_table[index, "Estimate"],
    std_error = coefficient_table[index, "Std. Error"],
    t_value = coefficient_table[index, "t value"],
    p_value = coefficient_table[index, "Pr(>|t|)"]
  ))

  # F test of the factor given all other terms: reduced vs full model.
  reduced <- update(fit, as.formula(paste(". ~ . -", factor_name)))
  comparison <- anova(reduced, fit)
  drop_table <- drop1(fit, test = "F")
  stopifnot(isTRUE(all.equal(drop_table[factor_name, "F value"], comparison$F[2], tolerance = 1e-12)))
  factor_test <- list(
    method = "anova(reduced, full): reduced model drops the factor, all other terms kept",
    F = comparison$F[2],
    df1 = as.integer(comparison$Df[2]),
    df2 = as.integer(comparison$Res.Df[2]),
    p_value = comparison$`Pr(>F)`[2],
    rss_full = comparison$RSS[2],
    rss_reduced = comparison$RSS[1]
  )

  # Adjusted means: set the factor to each level for ALL analysed rows,
  # average predict(); SE by the delta method with a = column means of the
  # counterfactual design matrix: sqrt(a' V a).
  levels_in_order <- levels(data[[factor_name]])
  covariance <- vcov(fit)
  averaged_rows <- list()
  adjusted_means <- lapply(levels_in_order, function(level) {
    counterfactual <- data
    counterfactual[[factor_name]] <- factor(rep(level, nrow(data)), levels = levels_in_order)
    prediction_mean <- mean(predict(fit, newdata = counterfactual))
    design_rows <- model.matrix(delete.response(terms(fit)), counterfactual,
                                xlev = fit$xlevels)
    averaged <- colMeans(design_rows)
    stopifnot(isTRUE(all.equal(sum(averaged * coef(fit)), prediction_mean, tolerance = 1e-12)))
    averaged_rows[[level]] <<- averaged
    list(level = level,
         estimate = prediction_mean,
         std_error = sqrt(drop(t(averaged) %*% covariance %*% averaged)),
         averaged_design_row = as.list(unname(averaged)))
  })

  # Pairwise contrast level - versus, from the difference of averaged rows.
  contrast_vector <- averaged_rows[[contrast_pair[1]]] - averaged_rows[[contrast_pair[2]]]
  contrast_estimate <- sum(contrast_vector * coef(fit))
  contrast_se <- sqrt(drop(t(contrast_vector) %*% covariance %*% contrast_vector))
  residual_df <- fit$df.residual
  t_value <- contrast_estimate / contrast_se
  quantile <- qt(0.975, residual_df)
  contrast <- list(
    level = contrast_pair[1], versus = contrast_pair[2],
    estimate = contrast_estimate, std_error = contrast_se, t_value = t_value,
    df = as.integer(residual_df), p_value = 2 * pt(-abs(t_value), residual_df),
    conf_level = 0.95,
    conf_low = contrast_estimate - quantile * contrast_se,
    conf_high = contrast_estimate + quantile * contrast_se,
    contrast_vector = as.list(unname(contrast_vector))
  )

  summary_fit <- summary(fit)
  c(list(
    dataset = name,
    description = description,
    generated_by = "tests/reference/ancova/make_reference.R",
    formula = paste(deparse(formula(fit)), collapse = " "),
    response = all.vars(formula(fit))[1],
    factor = factor_name,
    factor_levels = as.list(levels_in_order),
    reference_level = levels_in_order[1],
    covariates = as.list(covariates),
    blocking_factors = lapply(blocking_factors, function(block) list(
      name = block, levels = as.list(levels(data[[block]])))),
    coding = "treatment (dummy) coding, first level is the reference, columns in formula order",
    n_observations = nrow(data),
    design_columns = as.list(design_columns),
    coefficients = coefficients,
    residual_standard_deviation = summary_fit$sigma,
    residual_df = as.integer(residual_df),
    residual_sum_of_squares = sum(residuals(fit)^2),
    r_squared = summary_fit$r.squared,
    adjusted_r_squared = summary_fit$adj.r.squared,
    factor_test = factor_test,
    adjusted_means = adjusted_means,
    contrast = contrast
  ), versions)
}

write_reference <- function(values, path) {
  writeLines(json_value(values), path, sep = "\n", useBytes = TRUE)
}

# ---- (a) MASS::anorexia: Postwt ~ Treat + Prewt, reference "Cont" -------
anorexia_data <- MASS::anorexia
anorexia_data$Treat <- relevel(anorexia_data$Treat, ref = "Cont")
anorexia_csv <- data.frame(
  USUBJID = seq_len(nrow(anorexia_data)),
  Treat = as.character(anorexia_data$Treat),
  Prewt = anorexia_data$Prewt,
  Postwt = anorexia_data$Postwt,
  stringsAsFactors = FALSE
)
write_dataset_csv(anorexia_csv, file.path(output_folder, "anorexia.csv"))
anorexia_fit <- lm(Postwt ~ Treat + Prewt, data = anorexia_data)
write_reference(
  reference_values(
    "anorexia",
    "MASS::anorexia (Hand et al. 1993): weight (lb) of 72 young female anorexia patients before (Prewt) and after (Postwt) treatment; Treat = Cont (control), CBT (cognitive behavioural), FT (family)",
    anorexia_fit, anorexia_data, "Treat", c("FT", "CBT"), "Prewt", character(0)),
  file.path(output_folder, "anorexia_reference.json"))

# ---- (b) mtcars: mpg ~ cyl + wt + gear ------------------------------------
# A three-level "treatment" factor (cylinders), a numeric covariate (weight)
# and a three-level blocking factor (forward gears). Chosen because it is
# unbalanced and the terms are associated (most 8-cylinder cars have 3 gears,
# weight rises with cylinders), so adjusted means differ from raw means and
# the F test given the other terms differs from a sequential one; a balanced
# design would not exercise those computations.
mtcars_data <- data.frame(
  car = rownames(mtcars),
  cyl = factor(paste0("cyl", mtcars$cyl), levels = c("cyl4", "cyl6", "cyl8")),
  gear = factor(paste0("gear", mtcars$gear), levels = c("gear3", "gear4", "gear5")),
  wt = mtcars$wt,
  mpg = mtcars$mpg,
  stringsAsFactors = FALSE
)
mtcars_csv <- data.frame(
  USUBJID = seq_len(nrow(mtcars_data)),
  car = mtcars_data$car,
  cyl = as.character(mtcars_data$cyl),
  gear = as.character(mtcars_data$gear),
  wt = mtcars_data$wt,
  mpg = mtcars_data$mpg,
  stringsAsFactors = FALSE
)
write_dataset_csv(mtcars_csv, file.path(output_folder, "mtcars.csv"))
mtcars_fit <- lm(mpg ~ cyl + wt + gear, data = mtcars_data)
write_reference(
  reference_values(
    "mtcars",
    "datasets::mtcars (Henderson & Velleman 1981): 32 cars from Motor Trend 1974; mpg (miles per US gallon) by cylinders (cyl4/cyl6/cyl8, treated as the three-level factor), weight wt (1000 lb, covariate) and forward gears (gear3/gear4/gear5, blocking factor)",
    mtcars_fit, mtcars_data, "cyl", c("cyl8", "cyl6"), "wt", "gear"),
  file.path(output_folder, "mtcars_reference.json"))

cat("wrote reference files to", output_folder, "with", versions$r_version,
    "MASS", versions$mass_version, "\n")
