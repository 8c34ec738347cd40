# Frozen reference values for tests/test_stats_adjusted.py, from R's lm, car::Anova(type = 2) and
# multcomp::glht(mcp(segment = "Dunnett")), optionally with sandwich::vcovHC(type = "HC3").
# Run from this folder:  Rscript make_values.R   (writes values.json next to it)
# Made with R 4.2.2, car 3.1.1, carData 3.0.5, multcomp 1.4.22, sandwich 3.0.2, mvtnorm as installed
# by Debian's r-cran-multcomp (mvtnorm may warn "Completion with error > abseps"; the p-values still agree
# with ours to 2e-5). The CSV files were written from the packages' data sets by
#   write.csv(carData::Moore[, c("partner.status","conformity","fcategory")], "moore.csv", row.names=FALSE)
#   write.csv(datasets::warpbreaks, "warpbreaks.csv", row.names=FALSE)
#   write.csv(carData::Salaries[, c("rank","discipline","sex","salary")], "salaries.csv", row.names=FALSE)
#   write.csv(carData::Ornstein[, c("interlocks","sector","nation")], "ornstein.csv", row.names=FALSE)
suppressPackageStartupMessages({library(car); library(multcomp); library(sandwich)})

precise <- mvtnorm::GenzBretz(maxpts = 2e6, abseps = 1e-8, releps = 0)

one_case <- function(name, data, response, segment, reference, strata, log_scale = FALSE, hc3 = FALSE) {
  d <- data
  d$y <- if (log_scale) log(d[[response]]) else d[[response]]
  d$segment <- relevel(factor(d[[segment]]), ref = reference)
  for (s in strata) d[[s]] <- factor(d[[s]])
  f <- as.formula(paste("y ~ segment +", paste(strata, collapse = " + ")))
  mod <- lm(f, data = d)
  V <- if (hc3) sandwich::vcovHC(mod, type = "HC3") else vcov(mod)
  a <- if (hc3) car::Anova(mod, type = 2, white.adjust = "hc3") else car::Anova(mod, type = 2)
  terms <- lapply(c("segment", strata), function(t) list(
    term = t, df = a[t, "Df"], F = a[t, if (hc3) "F" else "F value"], p = a[t, "Pr(>F)"],
    ss = if (hc3) NA else a[t, "Sum Sq"]))
  g <- glht(mod, linfct = mcp(segment = "Dunnett"), vcov. = V)
  set.seed(20261202)
  s <- summary(g, test = adjusted("single-step", algorithm = precise))
  set.seed(20261202)
  ci <- confint(g, level = 0.95, calpha = adjusted_calpha(algorithm = precise))
  # confint's critical value comes from mvtnorm::qmvt, whose root search stops at about 1e-4;
  # the same quantile found to 1e-12 by uniroot on pmvt (same algorithm settings):
  R <- cov2cor(vcov(g)); m <- nrow(R)
  gap <- function(c) { set.seed(20261202); mvtnorm::pmvt(lower = -rep(c, m), upper = rep(c, m), df = mod$df.residual,
                                                         corr = R, algorithm = precise) - 0.95 }
  calpha <- uniroot(gap, c(1.5, 5), tol = 1e-12)$root
  segs <- sub(" - .*$", "", names(coef(g)))
  gaps <- lapply(seq_along(segs), function(i) list(
    segment = segs[i], estimate = unname(coef(g)[i]), se = unname(s$test$sigma[i]),
    t = unname(s$test$tstat[i]), p_adj = unname(s$test$pvalues[i]),
    low = unname(ci$confint[i, "lwr"]), high = unname(ci$confint[i, "upr"]),
    low_precise = unname(coef(g)[i] - calpha * s$test$sigma[i]), high_precise = unname(coef(g)[i] + calpha * s$test$sigma[i])))
  list(name = name, file = paste0(tolower(name), ".csv"), response = response, segment = segment,
       reference = reference, strata = as.list(strata), log_scale = log_scale, covariance = if (hc3) "hc3" else "classic",
       df_resid = mod$df.residual, terms = terms, critical_value = attr(ci$confint, "calpha"),
       critical_value_precise = calpha, gaps = gaps)
}

moore <- read.csv("moore.csv"); warp <- read.csv("warpbreaks.csv")
sal <- read.csv("salaries.csv"); orn <- read.csv("ornstein.csv")
cases <- list(
  one_case("moore", moore, "conformity", "fcategory", "low", c("partner.status")),
  one_case("moore", moore, "conformity", "fcategory", "low", c("partner.status"), hc3 = TRUE),
  one_case("warpbreaks", warp, "breaks", "tension", "L", c("wool"), log_scale = TRUE),
  one_case("salaries", sal, "salary", "rank", "AsstProf", c("discipline", "sex"), log_scale = TRUE),
  one_case("salaries", sal, "salary", "rank", "AsstProf", c("discipline", "sex"), log_scale = TRUE, hc3 = TRUE),
  one_case("ornstein", orn, "interlocks", "nation", "CAN", c("sector")),
  one_case("ornstein", orn, "interlocks", "nation", "CAN", c("sector"), hc3 = TRUE)
)
out <- list(source = paste("R", R.version$major, R.version$minor, "; car", packageVersion("car"),
                           "; multcomp", packageVersion("multcomp"), "; sandwich", packageVersion("sandwich")),
            command = "Rscript make_values.R", cases = cases)
writeLines(jsonlite::toJSON(out, auto_unbox = TRUE, digits = NA, pretty = TRUE, na = "null"), "values.json")
