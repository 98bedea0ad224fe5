# Reference values for cairn's stratified Cochran–Mantel–Haenszel tests.
#
# Run from this folder:  Rscript make_reference.R
# Writes tables.csv (long format: table,stratum,row,column,count), scores.csv and
# results.csv (every value printed with %.17g). The versions of R and of every package
# used are written into the header lines (starting with '#') of each file.
#
# Sources of the values in results.csv (column `source`):
#   mantelhaen  stats::mantelhaen.test (general association only; correct = FALSE for 2x2xK)
#   vcdextra    vcdExtra::CMHtest(..., overall = TRUE)$ALL (all three statistics)
#   hand        the formulas of Landis, Heyman & Koch (1978) written out below element by
#               element (hypergeometric covariances Cov(n_ij, n_kl), no package code)
#
# Tables:
#   ucb        datasets::UCBAdmissions, permuted to Gender x Admit x Dept (2x2x6)
#   esoph      datasets::esoph, sum of ncontrols as alcgp x tobgp x agegp (4x4x6)
#   arthritis  vcd::Arthritis, Treatment x Improved x Sex (2x3x2)
#   jobsat     Agresti, Categorical Data Analysis, 2nd ed. (2002), Table 6.12: income x job
#              satisfaction x gender for 104 black Americans (counts typed in from memory,
#              not re-read from the book; the total of 104 matches the book's text, and the
#              statistics agree with the values printed there as remembered — see the Rust test)
#   sparse     a made-up 3x3x4 table with a stratum of one subject (skipped), a stratum with
#              an arm missing and a stratum with a category missing; no package handles the
#              one-subject stratum, so the packages see it without that stratum; vcdExtra
#              stops on it (a single stratum's covariance is singular), so it has
#              `hand` and `mantelhaen` values only

suppressPackageStartupMessages({
  library(vcdExtra)
})

versions <- sprintf("# %s; vcdExtra %s; vcd %s; datasets %s; stats %s",
                    R.version.string, packageVersion("vcdExtra"), packageVersion("vcd"),
                    packageVersion("datasets"), packageVersion("stats"))

fmt <- function(x) sprintf("%.17g", x)

# ---------------------------------------------------------------- the tables
tables <- list()
tables$ucb <- aperm(UCBAdmissions, c(2, 1, 3))
tables$esoph <- xtabs(ncontrols ~ alcgp + tobgp + agegp, data = esoph)
data(Arthritis, package = "vcd")
tables$arthritis <- xtabs(~ Treatment + Improved + Sex, data = Arthritis)
female <- matrix(c(1, 3, 11, 2,  2, 3, 17, 3,  0, 1, 8, 5,  0, 2, 4, 2), 4, 4, byrow = TRUE)
male   <- matrix(c(1, 1, 2, 1,   0, 3, 5, 1,   0, 0, 7, 3,  0, 1, 9, 6), 4, 4, byrow = TRUE)
tables$jobsat <- array(c(female, male), c(4, 4, 2))
sparse <- array(0, c(3, 3, 4))
sparse[, , 1] <- matrix(c(5, 3, 1,  2, 4, 4,  1, 2, 6), 3, 3, byrow = TRUE)
sparse[, , 2] <- matrix(c(0, 0, 0,  0, 1, 0,  0, 0, 0), 3, 3, byrow = TRUE)  # one subject
sparse[, , 3] <- matrix(c(3, 2, 0,  0, 0, 0,  1, 3, 2), 3, 3, byrow = TRUE)  # arm 2 empty
sparse[, , 4] <- matrix(c(2, 0, 3,  1, 0, 4,  3, 0, 1), 3, 3, byrow = TRUE)  # category 2 empty
tables$sparse <- sparse

# Score sets: "integer" = 1..I for rows and 1..J for columns; "agresti" = the scores
# Agresti uses for the job-satisfaction table (income 3, 10, 20, 35 in thousands of dollars;
# satisfaction 1, 3, 4, 5); "planned" = arbitrary unequally spaced scores on the sparse table.
score_sets <- list(
  list(table = "ucb", name = "integer", rows = 1:2, columns = 1:2),
  list(table = "esoph", name = "integer", rows = 1:4, columns = 1:4),
  list(table = "arthritis", name = "integer", rows = 1:2, columns = 1:3),
  list(table = "jobsat", name = "integer", rows = 1:4, columns = 1:4),
  list(table = "jobsat", name = "agresti", rows = c(3, 10, 20, 35), columns = c(1, 3, 4, 5)),
  list(table = "sparse", name = "integer", rows = 1:3, columns = 1:3),
  list(table = "sparse", name = "planned", rows = c(0, 1, 4), columns = c(-1, 0.5, 2.25))
)

# ---------------------------------------------------------------- formulas by hand
# Cov(n_ij, n_kl) under the product-hypergeometric null, for one stratum:
#   r_i (delta_ik n - r_k) c_j (delta_jl n - c_l) / (n^2 (n - 1)).
cell_covariance <- function(r, cc, n, i, j, k, l) {
  r[i] * ((i == k) * n - r[k]) * cc[j] * ((j == l) * n - cc[l]) / (n^2 * (n - 1))
}

hand_cmh <- function(x, row_scores, column_scores) {
  I <- dim(x)[1]; J <- dim(x)[2]; K <- dim(x)[3]
  p_general <- (I - 1) * (J - 1)
  g_stat <- numeric(p_general); g_cov <- matrix(0, p_general, p_general)
  m_stat <- numeric(I - 1); m_cov <- matrix(0, I - 1, I - 1)
  c_stat <- 0; c_var <- 0
  for (h in seq_len(K)) {
    table_h <- matrix(x[, , h], I, J)
    n <- sum(table_h)
    if (n < 2) next
    r <- rowSums(table_h); cc <- colSums(table_h)
    expected <- outer(r, cc) / n
    # general association: cells (i, j), i < I, j < J, listed row by row
    index <- 0
    cells <- matrix(0, p_general, 2)
    for (i in 1:(I - 1)) for (j in 1:(J - 1)) { index <- index + 1; cells[index, ] <- c(i, j) }
    for (a in seq_len(p_general)) {
      g_stat[a] <- g_stat[a] + table_h[cells[a, 1], cells[a, 2]] - expected[cells[a, 1], cells[a, 2]]
      for (b in seq_len(p_general)) {
        g_cov[a, b] <- g_cov[a, b] +
          cell_covariance(r, cc, n, cells[a, 1], cells[a, 2], cells[b, 1], cells[b, 2])
      }
    }
    # row mean scores: sum over columns of column score times count, rows i < I
    for (i in 1:(I - 1)) {
      m_stat[i] <- m_stat[i] + sum(column_scores * (table_h[i, ] - expected[i, ]))
      for (k in 1:(I - 1)) {
        total <- 0
        for (j in 1:J) for (l in 1:J) {
          total <- total + column_scores[j] * column_scores[l] * cell_covariance(r, cc, n, i, j, k, l)
        }
        m_cov[i, k] <- m_cov[i, k] + total
      }
    }
    # correlation: sum of row score times column score times count
    c_stat <- c_stat + sum(outer(row_scores, column_scores) * (table_h - expected))
    for (i in 1:I) for (j in 1:J) for (k in 1:I) for (l in 1:J) {
      c_var <- c_var + row_scores[i] * column_scores[j] * row_scores[k] * column_scores[l] *
        cell_covariance(r, cc, n, i, j, k, l)
    }
  }
  general <- drop(t(g_stat) %*% solve(g_cov, g_stat))
  means <- drop(t(m_stat) %*% solve(m_cov, m_stat))
  correlation <- c_stat^2 / c_var
  list(
    general = c(general, p_general, pchisq(general, p_general, lower.tail = FALSE)),
    row_mean_scores = c(means, I - 1, pchisq(means, I - 1, lower.tail = FALSE)),
    correlation = c(correlation, 1, pchisq(correlation, 1, lower.tail = FALSE))
  )
}

# ---------------------------------------------------------------- run and write
result_rows <- character(0)
add_result <- function(table, scores, statistic, source, v) {
  result_rows <<- c(result_rows, paste(table, scores, statistic, source, fmt(v[1]), fmt(v[2]),
                                       fmt(v[3]), sep = ","))
}

for (set in score_sets) {
  x <- tables[[set$table]]
  hand <- hand_cmh(x, set$rows, set$columns)
  add_result(set$table, set$name, "general_association", "hand", hand$general)
  add_result(set$table, set$name, "row_mean_scores", "hand", hand$row_mean_scores)
  add_result(set$table, set$name, "correlation", "hand", hand$correlation)
  # vcdExtra cannot take a stratum of one subject (n - 1 = 0), so it sees the sparse table
  # without that stratum; the Rust code skips it, which must give the same numbers.
  x_for_packages <- x
  if (set$table == "sparse") x_for_packages <- x[, , -2, drop = FALSE]
  dimnames(x_for_packages) <- lapply(dim(x_for_packages), seq_len)
  # CMHtest also tests each stratum on its own and stops when one stratum's covariance is
  # singular (the sparse table's strata 3 and 4), so it gives no values there.
  overall <- tryCatch(CMHtest(x_for_packages, rscores = set$rows, cscores = set$columns,
                              types = c("cor", "rmeans", "general"), overall = TRUE)$ALL$table,
                      error = function(e) NULL)
  if (!is.null(overall)) {
    add_result(set$table, set$name, "general_association", "vcdextra", unlist(overall["general", ]))
    add_result(set$table, set$name, "row_mean_scores", "vcdextra", unlist(overall["rmeans", ]))
    add_result(set$table, set$name, "correlation", "vcdextra", unlist(overall["cor", ]))
  }
  if (set$name == "integer") {
    test <- if (all(dim(x_for_packages)[1:2] == 2)) {
      mantelhaen.test(x_for_packages, correct = FALSE)
    } else {
      mantelhaen.test(x_for_packages)
    }
    add_result(set$table, set$name, "general_association", "mantelhaen",
               c(unname(test$statistic), unname(test$parameter), test$p.value))
  }
}

write_lines <- function(file, header, rows) {
  writeLines(c(versions, header, rows), file)
}

table_rows <- character(0)
for (name in names(tables)) {
  x <- tables[[name]]
  for (h in seq_len(dim(x)[3])) for (i in seq_len(dim(x)[1])) for (j in seq_len(dim(x)[2])) {
    table_rows <- c(table_rows, paste(name, h, i, j, fmt(x[i, j, h]), sep = ","))
  }
}
write_lines("tables.csv", "table,stratum,row,column,count", table_rows)

score_rows <- character(0)
for (set in score_sets) {
  score_rows <- c(score_rows,
                  paste(set$table, set$name, "row", seq_along(set$rows), fmt(set$rows), sep = ","),
                  paste(set$table, set$name, "column", seq_along(set$columns), fmt(set$columns), sep = ","))
}
write_lines("scores.csv", "table,scores,side,index,score", score_rows)
write_lines("results.csv", "table,scores,statistic,source,value,df,p_value", result_rows)
cat(versions, "\n")
cat(result_rows, sep = "\n")
