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
