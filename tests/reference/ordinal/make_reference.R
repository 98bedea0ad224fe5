# Reference values for cairn's cumulative link (ordinal), nominal-effects, Brant-type and
# baseline-category (multinomial) logit engines.
#
# Run from this folder:  Rscript make_reference.R
# Writes:
#   <dataset>_data.csv       response (0-based category), weight, design columns WITHOUT intercept
#   reference_values.csv     case,quantity,index,value   (values printed with %.17g)
#   versions.txt             R and package versions used
#
# Sign convention: MASS::polr and ordinal::clm both model logit P(Y <= j) = zeta_j - eta with
# eta = x'beta, which is the same as cairn's g(P(Y <= j)) = theta_j - x'beta; no sign change is
# needed for cut-points or coefficients.
suppressPackageStartupMessages({ library(MASS); library(ordinal); library(nnet) })

versions <- c(sprintf("R %s", paste(R.version$major, R.version$minor, sep = ".")),
              sprintf("MASS %s", as.character(packageVersion("MASS"))),
              sprintf("ordinal %s", as.character(packageVersion("ordinal"))),
              sprintf("nnet %s", as.character(packageVersion("nnet"))))
writeLines(versions, "versions.txt")
cat(versions, sep = "\n")

fmt <- function(v) sprintf("%.17g", v)
rows <- list()
add <- function(case, quantity, values) {
  rows[[length(rows) + 1]] <<- data.frame(case = case, quantity = quantity,
                                          index = seq_along(values) - 1L,
                                          value = fmt(unname(values)),
                                          stringsAsFactors = FALSE)
}

write_data <- function(name, response, weight, design) {
  out <- data.frame(response = as.integer(response) - 1L, weight = weight, design,
                    check.names = FALSE)
  names(out) <- c("response", "weight", colnames(design))
  for (k in seq_len(ncol(out))[-1]) out[[k]] <- fmt(out[[k]])
  write.csv(out, sprintf("%s_data.csv", name), row.names = FALSE, quote = FALSE)
}

# Datasets shipped with R packages.
housing <- MASS::housing                       # Sat ~ Infl + Type + Cont, weights Freq
x_housing <- model.matrix(~ Infl + Type + Cont, housing)[, -1, drop = FALSE]
write_data("housing", housing$Sat, housing$Freq, x_housing)

wine <- ordinal::wine                          # rating ~ temp + contact
x_wine <- model.matrix(~ temp + contact, wine)[, -1, drop = FALSE]
write_data("wine", wine$rating, rep(1, nrow(wine)), x_wine)

warp <- datasets::warpbreaks                   # tension (L < M < H) ~ breaks + wool
warp$tension <- factor(warp$tension, levels = c("L", "M", "H"), ordered = TRUE)
x_warp <- model.matrix(~ breaks + wool, warp)[, -1, drop = FALSE]
write_data("warpbreaks", warp$tension, rep(1, nrow(warp)), x_warp)

ctrl <- clm.control(gradTol = 1e-12, relTol = 1e-14, maxIter = 500L)

fit_clm <- function(dataset, formula, data, weights, link) {
  data$.w <- weights
  fit <- clm(formula, data = data, weights = .w, link = link, control = ctrl)
  n_theta <- length(fit$alpha)
  se <- sqrt(diag(vcov(fit)))
  case <- sprintf("%s_%s_clm", dataset, link)
  add(case, "cut_point", fit$alpha)
  add(case, "coefficient", fit$beta)
  add(case, "se_cut_point", se[seq_len(n_theta)])
  add(case, "se_coefficient", se[-seq_len(n_theta)])
  add(case, "covariance", as.vector(t(vcov(fit))))     # row-major, cut-points first
  add(case, "log_likelihood", as.numeric(logLik(fit)))
  add(case, "max_abs_gradient", max(abs(fit$gradient)))
  fit
}

fit_polr <- function(dataset, formula, data, weights, method) {
  data$.w <- weights
  fit <- polr(formula, data = data, weights = .w, method = method, Hess = TRUE,
              control = list(reltol = 1e-15, maxit = 10000))
  case <- sprintf("%s_%s_polr", dataset, method)
  se <- sqrt(diag(vcov(fit)))
  n_beta <- length(fit$coefficients)
  add(case, "cut_point", fit$zeta)
  add(case, "coefficient", fit$coefficients)
  add(case, "se_cut_point", se[-seq_len(n_beta)])
  add(case, "se_coefficient", se[seq_len(n_beta)])
  add(case, "log_likelihood", as.numeric(logLik(fit)))
  fit
}

links <- c(logit = "logistic", probit = "probit", cloglog = "cloglog")
for (link in names(links)) {
  fit_clm("housing", Sat ~ Infl + Type + Cont, housing, housing$Freq, link)
  fit_clm("wine", rating ~ temp + contact, wine, rep(1, nrow(wine)), link)
  fit_clm("warpbreaks", tension ~ breaks + wool, warp, rep(1, nrow(warp)), link)
  fit_polr("housing", Sat ~ Infl + Type + Cont, housing, housing$Freq, links[[link]])
  fit_polr("wine", rating ~ temp + contact, wine, rep(1, nrow(wine)), links[[link]])
}

# Proportional-odds check: likelihood-ratio test per term. ordinal::nominal_test is run with
# clm's default tolerances (it does not accept tighter ones), so its LRT is recorded as
# "lrt_nominal_test"; the sharper reference "lrt" is 2 (logLik(nominal fit) - logLik(PO fit))
# from clm fits with tight tolerances, where the nominal fit lets the term's effect vary by
# cut-point (clm's nominal = ~ term). For wine, temp has no warm subject in rating 1 and no cold
# subject in rating 5, so its nominal fit is separated (clm warns that the Hessian is singular)
# and its log-likelihood is a supremum approached as coefficients diverge.
nominal_lr <- function(dataset, formula, data, weights, terms, nt) {
  data$.w <- weights
  po <- clm(formula, data = data, weights = .w, control = ctrl)
  for (term in terms) {
    case <- sprintf("%s_nominal_%s", dataset, term)
    nominal_fit <- suppressWarnings(clm(formula, nominal = as.formula(paste("~", term)),
                                        data = data, weights = .w, control = ctrl))
    add(case, "lrt_nominal_test", nt[term, "LRT"])
    add(case, "df", nt[term, "Df"])
    add(case, "log_likelihood", as.numeric(logLik(nominal_fit)))
    # clm's threshold parameters for a nominal fit are column-major: the J-1 intercepts, then
    # the J-1 effects of each nominal column, entering as + z * alpha (cairn: - z * gamma_j, so
    # gamma = -alpha); then the common coefficients (NA entries are the nominal columns).
    # (Skipped for the separated fit, whose covariance clm cannot give.)
    se <- suppressWarnings(sqrt(diag(vcov(nominal_fit))))
    if (all(is.finite(se))) {
      add(case, "alpha", nominal_fit$alpha)
      add(case, "beta", nominal_fit$beta[!is.na(nominal_fit$beta)])
      add(case, "se", se)
    }
    add(case, "log_likelihood_po", as.numeric(logLik(po)))
    add(case, "lrt", 2 * (as.numeric(logLik(nominal_fit)) - as.numeric(logLik(po))))
  }
}
# nominal_test refits through update(), so it is called on fits written out at top level.
nt_wine <- nominal_test(clm(rating ~ temp + contact, data = wine))
nt_housing <- nominal_test(clm(Sat ~ Infl + Type + Cont, weights = Freq, data = housing))
nt_warp <- nominal_test(clm(tension ~ breaks + wool, data = warp))
print(nt_wine); print(nt_housing); print(nt_warp)
nominal_lr("wine", rating ~ temp + contact, wine, rep(1, nrow(wine)), c("temp", "contact"),
           nt_wine)
nominal_lr("housing", Sat ~ Infl + Type + Cont, housing, housing$Freq, c("Infl", "Type", "Cont"),
           nt_housing)
nominal_lr("warpbreaks", tension ~ breaks + wool, warp, rep(1, nrow(warp)), c("breaks", "wool"),
           nt_warp)

# Brant-type Wald test (Brant 1990, Biometrics 46:1171-1178), assembled by hand: separate
# binary logit fits for each split Y > j, the joint covariance of the stacked estimates
#   Var(b_j) = (X'W_jj X)^-1,  Cov(b_j, b_l) = (X'W_jj X)^-1 (X'W_jl X) (X'W_ll X)^-1,
#   W_jl = diag(w_i (pi_il - pi_ij pi_il)) for j < l, W_jj = diag(w_i pi_ij (1 - pi_ij)),
# where pi_ij is the fitted P(Y > j) from split j and X includes the intercept column; then
# the Wald statistic for equality of the slopes across splits, overall and per term.
brant_by_hand <- function(case, y, w, x, terms) {
  n_cat <- max(y) + 1L
  X <- cbind(1, x)
  p <- ncol(x)
  fits <- lapply(0:(n_cat - 2L), function(j) {
    z <- as.numeric(y > j)
    suppressWarnings(glm(z ~ x, family = binomial, weights = w,
                         control = glm.control(epsilon = 1e-15, maxit = 200)))
  })
  pis <- sapply(fits, fitted)
  m <- n_cat - 1L
  info_inv <- lapply(1:m, function(j) solve(t(X) %*% (X * (w * pis[, j] * (1 - pis[, j])))))
  V <- matrix(0, m * (p + 1), m * (p + 1))
  for (j in 1:m) for (l in 1:m) {
    if (j == l) {
      block <- info_inv[[j]]
    } else {
      a <- min(j, l); b <- max(j, l)
      wjl <- w * (pis[, b] - pis[, a] * pis[, b])
      block <- info_inv[[j]] %*% (t(X) %*% (X * wjl)) %*% info_inv[[l]]
    }
    V[((j - 1) * (p + 1) + 1):(j * (p + 1)), ((l - 1) * (p + 1) + 1):(l * (p + 1))] <- block
  }
  slope_index <- unlist(lapply(1:m, function(j) (j - 1) * (p + 1) + 1 + (1:p)))
  beta_star <- unlist(lapply(fits, function(f) coef(f)[-1]))
  V_star <- V[slope_index, slope_index]
  wald <- function(columns) {
    k <- length(columns)
    D <- matrix(0, (m - 1) * k, m * p)
    r <- 0
    for (j in 2:m) for (col in columns) {
      r <- r + 1
      D[r, col] <- 1
      D[r, (j - 1) * p + col] <- -1
    }
    d <- D %*% beta_star
    c(as.numeric(t(d) %*% solve(D %*% V_star %*% t(D), d)), nrow(D))
  }
  overall <- wald(1:p)
  add(case, "overall", overall)
  for (t_index in seq_along(terms)) add(case, sprintf("term_%d", t_index - 1L), wald(terms[[t_index]]))
  add(case, "split_coefficients", beta_star)
  print(c(case, overall))
}
# (Not run for wine: the split "rating > 4" has no cold subject, so that binary fit is separated
# and Brant's covariance does not exist.)
brant_by_hand("housing_brant", as.integer(housing$Sat) - 1L, housing$Freq, x_housing,
              list(1:2, 3:5, 6))
brant_by_hand("warpbreaks_brant", as.integer(warp$tension) - 1L, rep(1, nrow(warp)), x_warp,
              list(1, 2))

# Baseline-category logit with nnet::multinom (reference = first level), design WITH intercept.
# nnet stops at its own tolerance, so its values agree with the exact maximum only to about 1e-6;
# statsmodels MNLogit (make_reference.py) converges tightly and is the sharper reference.
fit_multinom <- function(case, formula, data, weights) {
  data$.w <- weights
  fit <- multinom(formula, data = data, weights = .w, reltol = 1e-14, abstol = 1e-300,
                  maxit = 100000, trace = FALSE, Hess = TRUE)
  s <- summary(fit)
  add(case, "coefficient", as.vector(t(coef(fit))))   # category-major: each non-reference row
  add(case, "se_coefficient", as.vector(t(s$standard.errors)))
  add(case, "log_likelihood", as.numeric(logLik(fit)))
}
housing_nominal <- housing
housing_nominal$Sat <- factor(housing_nominal$Sat, ordered = FALSE)
fit_multinom("housing_multinom", Sat ~ Infl + Type + Cont, housing_nominal, housing$Freq)
warp_nominal <- warp
warp_nominal$tension <- factor(warp_nominal$tension, ordered = FALSE)
fit_multinom("warpbreaks_multinom", tension ~ breaks + wool, warp_nominal, rep(1, nrow(warp)))

# Inverse links on a grid, for the accuracy of the distribution functions themselves.
grid <- c(-30, -8, -5, -3, -2, -1.5, -1, -0.7, -0.5, -0.3, -0.1, 0, 0.1, 0.3, 0.5, 0.7, 1, 1.5, 2,
          3, 5, 8)
add("inverse_link_grid", "t", grid)
add("inverse_link_grid", "logit", plogis(grid))
add("inverse_link_grid", "probit", pnorm(grid))
add("inverse_link_grid", "cloglog", -expm1(-exp(grid)))

out <- do.call(rbind, rows)
write.csv(out, "reference_values.csv", row.names = FALSE, quote = FALSE)
cat(sprintf("wrote %d reference values\n", nrow(out)))
