# Reference adjusted p-values from R's stats::p.adjust for cairn's multiplicity tests.
# Reads p_value_vectors.csv (NA = failed analysis, counted in the family size through
# p.adjust's argument n) and writes p_adjust_R-<version>.csv next to this script.
# Run from this folder:  Rscript make_reference.R
inputs <- read.csv("p_value_vectors.csv", comment.char = "#", stringsAsFactors = FALSE,
                   colClasses = c("character", "integer", "character"))
inputs$p <- suppressWarnings(as.numeric(inputs$p))  # "NA" becomes NA
methods <- c("bonferroni", "holm", "hochberg", "hommel")
version <- paste(R.version$major, R.version$minor, sep = ".")
out_file <- sprintf("p_adjust_R-%s.csv", version)
lines <- c(sprintf("# %s; stats %s; p.adjust(p, method, n = length(p)); written by make_reference.R",
                   R.version.string, packageVersion("stats")),
           "vector,index,p,method,adjusted")
for (vector in unique(inputs$vector)) {
  p <- inputs$p[inputs$vector == vector]
  for (method in methods) {
    adjusted <- p.adjust(p, method = method, n = length(p))
    lines <- c(lines, sprintf("%s,%d,%s,%s,%s", vector, seq_along(p),
                              ifelse(is.na(p), "NA", sprintf("%.17g", p)), method,
                              ifelse(is.na(adjusted), "NA", sprintf("%.17g", adjusted))))
  }
}
writeLines(lines, out_file)
cat("wrote", out_file, "\n")
