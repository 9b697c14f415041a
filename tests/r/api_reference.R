# Reference values from R's survey package (Lumley) on the California school data it ships
# (data(api)), for tests/test_against_r.py. Usage: Rscript api_reference.R OUTDIR
# Writes the three samples as coded CSV files and, for every cell, R's estimate, SE,
# degrees of freedom and Korn-Graubard ("beta") interval, and the paired change 1999 -> 2000.
suppressMessages(library(survey))
data(api)
out <- commandArgs(trailingOnly = TRUE)[1]
options(survey.lonely.psu = "fail")

coded <- function(d) {
  data.frame(snum = d$snum, dnum = d$dnum, pw = d$pw, fpc = if (is.null(d$fpc)) NA else d$fpc,
             stype = match(as.character(d$stype), c("E", "H", "M")),
             sch_wide = ifelse(d$sch.wide == "Yes", 1, 2), awards = ifelse(d$awards == "Yes", 1, 2),
             api00 = d$api00, api99 = d$api99)
}
samples <- list(apistrat = apistrat, apiclus1 = apiclus1, apiclus2 = apiclus2)
designs <- list(
  apistrat = function(d) svydesign(id = ~1, strata = ~stype, weights = ~pw, data = d),
  apiclus1 = function(d) svydesign(id = ~dnum, weights = ~pw, data = d),
  apiclus2 = function(d) svydesign(id = ~dnum + snum, weights = ~pw, data = d))

# the cells compared: the total, then each subgroup (as R's subset() of the design)
CELLS <- list(c("total", "Total", "TRUE"))
for (lv in 1:3) CELLS[[length(CELLS) + 1]] <- c("stype", c("E", "H", "M")[lv], paste0("stype == ", lv))
for (lv in 1:2) CELLS[[length(CELLS) + 1]] <- c("awards", c("Yes", "No")[lv], paste0("awards == ", lv))
cell_of <- function(des, cell) if (cell[1] == "total") des else des[eval(parse(text = cell[3]), des$variables), ]

rows <- list()
for (name in names(samples)) {
  d <- coded(samples[[name]])
  write.csv(d, file.path(out, paste0(name, ".csv")), row.names = FALSE)
  des <- designs[[name]](d)
  des <- update(des, yes = as.numeric(sch_wide == 1), api_2000 = api00, api_1999 = api99)
  for (cell in CELLS) {
    sub <- cell_of(des, cell)
    m <- svymean(~api00, sub)
    s <- svymean(~yes, sub)
    kg <- svyciprop(~yes, sub, method = "beta")
    ch <- svycontrast(svymean(~api_2000 + api_1999, sub), c(1, -1))
    rows[[length(rows) + 1]] <- data.frame(
      design = name, group = cell[1], subgroup = cell[2], n = sum(weights(sub) > 0),
      api00 = coef(m)[[1]], api00_se = SE(m)[[1]], yes = coef(s)[[1]], yes_se = SE(s)[[1]],
      df = degf(sub), kg_low = attr(kg, "ci")[[1]], kg_high = attr(kg, "ci")[[2]],
      change = coef(ch)[[1]], change_se = SE(ch)[[1]])
  }
}
write.csv(do.call(rbind, rows), file.path(out, "reference.csv"), row.names = FALSE)

# The finite population correction: apistrat (each stratum's school count) and apiclus1 (757
# districts), as svydesign(fpc = ~fpc).
fpc_rows <- list()
fpc_designs <- list(
  apistrat = function(d) svydesign(id = ~1, strata = ~stype, weights = ~pw, data = d, fpc = ~fpc),
  apiclus1 = function(d) svydesign(id = ~dnum, weights = ~pw, data = d, fpc = ~fpc))
for (name in names(fpc_designs)) {
  des <- fpc_designs[[name]](coded(samples[[name]]))
  des <- update(des, yes = as.numeric(sch_wide == 1), api_2000 = api00, api_1999 = api99)
  for (cell in CELLS) {
    sub <- cell_of(des, cell)
    m <- svymean(~api00, sub)
    ch <- svycontrast(svymean(~api_2000 + api_1999, sub), c(1, -1))
    fpc_rows[[length(fpc_rows) + 1]] <- data.frame(
      design = name, group = cell[1], subgroup = cell[2], api00 = coef(m)[[1]], api00_se = SE(m)[[1]],
      yes_se = SE(svymean(~yes, sub))[[1]], change = coef(ch)[[1]], change_se = SE(ch)[[1]])
  }
}
write.csv(do.call(rbind, fpc_rows), file.path(out, "fpc_reference.csv"), row.names = FALSE)

# Raked weights: apiclus1 raked to school type and to the school-wide target (as the package's
# tests/rakecheck.R), without and with the finite population correction.
raked <- list()
pop_types <- data.frame(stype = c(1, 2, 3), Freq = c(4421, 755, 1018))
pop_wide <- data.frame(sch_wide = c(1, 2), Freq = c(5122, 1072))
for (with_fpc in c(FALSE, TRUE)) {
  d <- coded(apiclus1)
  des <- if (with_fpc) svydesign(id = ~dnum, weights = ~pw, data = d, fpc = ~fpc) else
    svydesign(id = ~dnum, weights = ~pw, data = d)
  des <- rake(des, list(~stype, ~sch_wide), list(pop_types, pop_wide), control = list(maxit = 100, epsilon = 1e-12))
  des <- update(des, yes = as.numeric(sch_wide == 1), elementary = as.numeric(stype == 1),
                award = as.numeric(awards == 1))
  if (!with_fpc) write.csv(data.frame(snum = d$snum, raked = weights(des)), file.path(out, "raked_weights.csv"),
                           row.names = FALSE)
  for (cell in CELLS) {
    sub <- cell_of(des, cell)
    est <- svymean(~api00 + yes + elementary + award, sub)
    raked[[length(raked) + 1]] <- data.frame(
      fpc = with_fpc, group = cell[1], subgroup = cell[2], api00 = coef(est)[["api00"]],
      api00_se = SE(est)[["api00"]], yes_se = SE(est)[["yes"]], elementary = coef(est)[["elementary"]],
      elementary_se = SE(est)[["elementary"]], award = coef(est)[["award"]], award_se = SE(est)[["award"]])
  }
}
write.csv(do.call(rbind, raked), file.path(out, "raked_reference.csv"), row.names = FALSE)

# subgroups compared within the raked wave (no fpc): school types' mean api00 pairwise by
# svycontrast on the domain means of svyglm(api00 ~ 0 + stype) (svyby(covmat = TRUE) fails on a
# raked design in this version), and the Wald test across them (regTermTest)
d <- coded(apiclus1)
des <- rake(svydesign(id = ~dnum, weights = ~pw, data = d), list(~stype, ~sch_wide), list(pop_types, pop_wide),
            control = list(maxit = 100, epsilon = 1e-12))
des <- update(des, stype_f = factor(stype))
by <- svyglm(api00 ~ 0 + stype_f, des)
raked_pairs <- list()
for (pr in list(c(1, 2), c(1, 3), c(2, 3))) {
  w <- rep(0, 3); w[pr[1]] <- 1; w[pr[2]] <- -1
  k <- svycontrast(by, w)
  raked_pairs[[length(raked_pairs) + 1]] <- data.frame(a = pr[1], b = pr[2], diff = as.vector(coef(k)),
                                                       se = as.vector(SE(k)), F = NA, ddf = NA, p = NA)
}
t <- regTermTest(svyglm(api00 ~ stype_f, des), ~stype_f, method = "Wald")
raked_pairs[[length(raked_pairs) + 1]] <- data.frame(a = 0, b = 0, diff = NA, se = NA, F = as.vector(t$Ftest),
                                                     ddf = t$ddf, p = as.vector(t$p))
write.csv(do.call(rbind, raked_pairs), file.path(out, "raked_pairs.csv"), row.names = FALSE)
k <- svychisq(~stype_f + awards_f, update(des, awards_f = factor(awards)))
write.csv(data.frame(f = as.vector(k$statistic), ndf = k$parameter[[1]], ddf = k$parameter[[2]],
                     p = as.vector(k$p.value)), file.path(out, "raked_svychisq.csv"), row.names = FALSE)

# Bounded raking: apiclus1 calibrated to the same margins with each weight kept within 0.85 to
# 1.8 times its design weight (three schools reach the upper bound), as calibrate(calfun =
# "raking", bounds = ); the variance regresses on the margins with the design weights. The
# totals are the margins' shares of the design weights' sum (6194.001), which tracker keeps.
d <- coded(apiclus1)
des <- svydesign(id = ~dnum, weights = ~pw, data = d)
pop <- c(`(Intercept)` = 6194, `factor(stype)2` = 755, `factor(stype)3` = 1018, `factor(sch_wide)2` = 1072) * sum(d$pw) / 6194
des <- calibrate(des, ~factor(stype) + factor(sch_wide), pop, calfun = "raking", bounds = c(0.85, 1.8),
                 maxit = 200, epsilon = 1e-13)
des <- update(des, yes = as.numeric(sch_wide == 1), elementary = as.numeric(stype == 1),
              award = as.numeric(awards == 1))
write.csv(data.frame(snum = d$snum, bounded = weights(des)), file.path(out, "bounded_weights.csv"),
          row.names = FALSE)
bounded <- list()
for (cell in CELLS) {
  sub <- cell_of(des, cell)
  est <- svymean(~api00 + yes + elementary + award, sub)
  bounded[[length(bounded) + 1]] <- data.frame(
    group = cell[1], subgroup = cell[2], api00 = coef(est)[["api00"]], api00_se = SE(est)[["api00"]],
    yes_se = SE(est)[["yes"]], elementary_se = SE(est)[["elementary"]], award = coef(est)[["award"]],
    award_se = SE(est)[["award"]])
}
write.csv(do.call(rbind, bounded), file.path(out, "bounded_reference.csv"), row.names = FALSE)

# Rao-Scott: the make-up by school type of apiclus1 against apiclus2 (independent samples),
# stacked with the wave as a stratum and each wave's weights scaled to its respondents.
stack <- rbind(transform(coded(apiclus1), wave = 1), transform(coded(apiclus2), wave = 2))
stack$w <- stack$pw * ave(stack$pw, stack$wave, FUN = function(x) length(x) / sum(x))
stack$psu <- paste(stack$wave, stack$dnum)
des <- svydesign(id = ~psu, strata = ~wave, weights = ~w, data = stack)
f <- svychisq(~wave + stype, des, statistic = "F")
first <- svychisq(~wave + stype, des, statistic = "Chisq")
write.csv(data.frame(f = f$statistic[[1]], f_df1 = f$parameter[[1]], f_df2 = f$parameter[[2]], f_p = f$p.value,
                     chisq = first$statistic[[1]], chisq_p = first$p.value),
          file.path(out, "raoscott_reference.csv"), row.names = FALSE)

# One-cluster strata: apiclus2's districts stratified by county (17 of 26 counties hold one
# district), under each of R's rules for a lonely PSU.
d <- coded(apiclus2)
d$county <- as.character(apiclus2$cname)
write.csv(d, file.path(out, "lonely.csv"), row.names = FALSE)
lonely <- list()
for (rule in c("adjust", "average", "certainty")) {
  options(survey.lonely.psu = rule)
  des <- svydesign(id = ~dnum, strata = ~county, weights = ~pw, data = d, nest = TRUE)
  des <- update(des, yes = as.numeric(sch_wide == 1))
  for (cell in CELLS) {
    sub <- cell_of(des, cell)
    lonely[[length(lonely) + 1]] <- data.frame(
      rule = rule, group = cell[1], subgroup = cell[2], api00_se = SE(svymean(~api00, sub))[[1]],
      yes_se = SE(svymean(~yes, sub))[[1]])
  }
}
write.csv(do.call(rbind, lonely), file.path(out, "lonely_reference.csv"), row.names = FALSE)
