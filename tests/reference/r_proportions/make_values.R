# Frozen reference values for tests/test_method_proportions.py.
# Run from this folder:  Rscript make_values.R > values.json
# Data: prop.test's help-page example (smokers among lung-cancer patients in four groups,
# Fleiss 1981, Statistical Methods for Rates and Proportions, 2nd ed., p. 139), R's
# datasets::UCBAdmissions summed over sex (Bickel, Hammel & O'Connell 1975; admitted of
# applicants by department) and fisher.test's help-page tea-tasting table (Fisher 1935).
# Only base R (stats) is used.

num <- function(x) formatC(x, digits = 17, format = "g")
vec <- function(x) paste0("[", paste(num(x), collapse = ", "), "]")
item <- function(name, value) paste0('  "', name, '": ', value)

smokers <- c(83, 90, 129, 70)
patients <- c(86, 93, 136, 82)
pt <- prop.test(smokers, patients, correct = FALSE)
ct <- chisq.test(cbind(smokers, patients - smokers), correct = FALSE)

ucb <- apply(UCBAdmissions, c(1, 3), sum)
admitted <- as.numeric(ucb["Admitted", ])
applied <- as.numeric(colSums(ucb))
ut <- prop.test(admitted, applied, correct = FALSE)
# pairs without continuity correction, Holm within the family (lower triangle, column by column)
pw <- pairwise.prop.test(admitted, applied, correct = FALSE, p.adjust.method = "holm")$p.value
pw_raw <- pairwise.prop.test(admitted, applied, correct = FALSE, p.adjust.method = "none")$p.value
pairs_holm <- c(); pairs_raw <- c(); pairs_ij <- c()
for (j in 1:5) for (i in (j + 1):6) {
  pairs_holm <- c(pairs_holm, pw[i - 1, j]); pairs_raw <- c(pairs_raw, pw_raw[i - 1, j])
  pairs_ij <- c(pairs_ij, paste0("[", j - 1, ", ", i - 1, "]"))
}
# each department against department A (the reference), Holm over the five
ref_raw <- sapply(2:6, function(i) prop.test(admitted[c(i, 1)], applied[c(i, 1)], correct = FALSE)$p.value)
ref_holm <- p.adjust(ref_raw, "holm")

# the smokers' pairs with Fisher's exact test (small expected counts), Holm
f_raw <- c(); for (j in 1:3) for (i in (j + 1):4) {
  tab <- matrix(c(smokers[j], patients[j] - smokers[j], smokers[i], patients[i] - smokers[i]), 2, byrow = TRUE)
  f_raw <- c(f_raw, fisher.test(tab)$p.value)
}
f_holm <- p.adjust(f_raw, "holm")

tea <- fisher.test(matrix(c(3, 1, 1, 3), 2))

set.seed(20261203)
mc <- chisq.test(cbind(smokers, patients - smokers), simulate.p.value = TRUE, B = 20000)

cat("{\n", paste(c(
  item("r_version", paste0('"', R.version.string, '"')),
  item("smokers", vec(smokers)), item("patients", vec(patients)),
  item("smokers_prop_test_statistic", num(unname(pt$statistic))),
  item("smokers_prop_test_df", num(unname(pt$parameter))),
  item("smokers_prop_test_p", num(pt$p.value)),
  item("smokers_chisq_test_statistic", num(unname(ct$statistic))),
  item("smokers_chisq_test_p", num(ct$p.value)),
  item("smokers_fisher_pairs_raw", vec(f_raw)),
  item("smokers_fisher_pairs_holm", vec(f_holm)),
  item("smokers_monte_carlo_p", num(mc$p.value)),
  item("smokers_monte_carlo_B", "20000"),
  item("ucb_admitted", vec(admitted)), item("ucb_applied", vec(applied)),
  item("ucb_prop_test_statistic", num(unname(ut$statistic))),
  item("ucb_prop_test_p", num(ut$p.value)),
  item("ucb_pairs", paste0("[", paste(pairs_ij, collapse = ", "), "]")),
  item("ucb_pairs_raw", vec(pairs_raw)),
  item("ucb_pairs_holm", vec(pairs_holm)),
  item("ucb_vs_A_raw", vec(ref_raw)),
  item("ucb_vs_A_holm", vec(ref_holm)),
  item("tea_fisher_p", num(tea$p.value))
), collapse = ",\n"), "\n}\n", sep = "")
