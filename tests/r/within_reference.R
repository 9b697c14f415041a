# Reference values from R's survey package (Lumley) for whole distributions and subgroups
# compared within a wave, on the California school data it ships (data(api)), for
# tests/test_against_r.py. Usage: Rscript within_reference.R OUTDIR (after api_reference.R
# wrote the coded samples there).
suppressMessages(library(survey))
data(api)
out <- commandArgs(trailingOnly = TRUE)[1]
options(survey.lonely.psu = "fail")
designs <- list(
  apistrat = function(d) svydesign(id = ~1, strata = ~stype, weights = ~pw, data = d),
  apiclus1 = function(d) svydesign(id = ~dnum, weights = ~pw, data = d))
codes <- list(); quart <- list(); pairs <- list(); overall <- list()
for (name in names(designs)) {
  d <- read.csv(file.path(out, paste0(name, ".csv")))
  des <- designs[[name]](d)
  des <- update(des, stype_f = factor(stype), awards_f = factor(awards), yes = as.numeric(sch_wide == 1))
  # every code of stype, in total and among award schools
  for (cell in list(c("total", "Total"), c("awards", "Yes"))) {
    sub <- if (cell[1] == "total") des else subset(des, awards == 1)
    m <- svymean(~stype_f, sub)
    codes[[length(codes) + 1]] <- data.frame(design = name, group = cell[1], subgroup = cell[2],
      code = sub("stype_f", "", names(coef(m))), value = as.vector(coef(m)), se = as.vector(SE(m)))
    q <- svyquantile(~api00, sub, c(0.25, 0.5, 0.75), ci = TRUE)[[1]]
    quart[[length(quart) + 1]] <- data.frame(design = name, group = cell[1], subgroup = cell[2],
      p = c(0.25, 0.5, 0.75), value = q[, 1], low = q[, 2], high = q[, 3], se = q[, 4])
  }
  # the levels of stype compared pairwise and each against the rest, for the mean API and the share
  for (v in c("api00", "yes")) {
    f <- as.formula(paste0("~", v))
    by <- svyby(f, ~stype_f, des, svymean, covmat = TRUE)
    for (pr in list(c(1, 2), c(1, 3), c(2, 3))) {
      w <- rep(0, 3); w[pr[1]] <- 1; w[pr[2]] <- -1
      k <- svycontrast(by, w)
      pairs[[length(pairs) + 1]] <- data.frame(design = name, metric = v, a = pr[1], b = pr[2],
        diff = as.vector(coef(k)), se = as.vector(SE(k)))
    }
    for (lv in 1:3) {
      des2 <- update(des, rest = factor(ifelse(stype == lv, "in", "out"), levels = c("in", "out")))
      by2 <- svyby(f, ~rest, des2, svymean, covmat = TRUE)
      k <- svycontrast(by2, c(1, -1))
      pairs[[length(pairs) + 1]] <- data.frame(design = name, metric = v, a = lv, b = 0,
        diff = as.vector(coef(k)), se = as.vector(SE(k)))
    }
    g <- svyglm(as.formula(paste0(v, " ~ stype_f")), des)
    t <- regTermTest(g, ~stype_f, method = "Wald")
    overall[[length(overall) + 1]] <- data.frame(design = name, metric = v, F = as.vector(t$Ftest),
      df1 = t$df, df2 = t$ddf, p = as.vector(t$p))
  }
}
# the change of a gap from 1999 to 2000 (the same schools: paired, and the same districts)
dids <- list()
for (name in names(designs)) {
  d <- read.csv(file.path(out, paste0(name, ".csv")))
  des <- update(designs[[name]](d), stype_f = factor(stype))
  by <- svyby(~api00 + api99, ~stype_f, des, svymean, covmat = TRUE)
  nm <- names(coef(by))
  for (pr in list(c(1, 2), c(1, 3), c(2, 3))) {
    w <- setNames(rep(0, length(nm)), nm)
    w[paste0(pr[1], ":api00")] <- 1; w[paste0(pr[2], ":api00")] <- -1
    w[paste0(pr[1], ":api99")] <- -1; w[paste0(pr[2], ":api99")] <- 1
    k <- svycontrast(by, w)
    dids[[length(dids) + 1]] <- data.frame(design = name, a = pr[1], b = pr[2], change = as.vector(coef(k)),
                                           se = as.vector(SE(k)))
  }
}
write.csv(do.call(rbind, dids), file.path(out, "gap_changes.csv"), row.names = FALSE)

# drivers: svyglm of the API on three school attributes; and mtcars as R ships it (the rwa
# package's documented example of Johnson's relative weights uses it)
fits <- list()
raw <- list(apistrat = apistrat, apiclus1 = apiclus1)
for (name in names(designs)) {
  d <- raw[[name]][, c("snum", "dnum", "pw", "stype", "api00", "ell", "meals", "mobility")]
  d$stype <- match(as.character(d$stype), c("E", "H", "M"))
  write.csv(d, file.path(out, paste0("drivers_", name, ".csv")), row.names = FALSE)
  g <- svyglm(api00 ~ ell + meals + mobility, designs[[name]](d))
  fits[[length(fits) + 1]] <- data.frame(design = name, term = names(coef(g)), coefficient = as.vector(coef(g)),
                                         se = as.vector(SE(g)))
}
write.csv(do.call(rbind, fits), file.path(out, "svyglm.csv"), row.names = FALSE)
cars <- data.frame(car = seq_len(nrow(mtcars)), mtcars)
write.csv(cars, file.path(out, "mtcars.csv"), row.names = FALSE)
chisq <- list()
for (name in names(designs)) {
  d <- read.csv(file.path(out, paste0(name, ".csv")))
  des <- update(designs[[name]](d), stype_f = factor(stype), awards_f = factor(awards))
  k <- svychisq(~stype_f + awards_f, des)
  chisq[[length(chisq) + 1]] <- data.frame(design = name, f = as.vector(k$statistic), ndf = k$parameter[[1]],
                                           ddf = k$parameter[[2]], p = as.vector(k$p.value))
}
write.csv(do.call(rbind, chisq), file.path(out, "svychisq.csv"), row.names = FALSE)
write.csv(do.call(rbind, codes), file.path(out, "codes.csv"), row.names = FALSE)
write.csv(do.call(rbind, quart), file.path(out, "quartiles.csv"), row.names = FALSE)
write.csv(do.call(rbind, pairs), file.path(out, "within_pairs.csv"), row.names = FALSE)
write.csv(do.call(rbind, overall), file.path(out, "within_overall.csv"), row.names = FALSE)

# replicate weights: apiclus1 as JK1 (R's own tests give api00 SE 26.329), apistrat as JKn and
# as a seeded bootstrap; the replicate weights written beside the data, R's values per cell
rep_rows <- list()
rep_designs <- list(
  jk1 = list(name = "apiclus1", make = function(d) as.svrepdesign(svydesign(id = ~dnum, weights = ~pw, data = d),
                                                                  type = "JK1")),
  jkn = list(name = "apistrat", make = function(d) as.svrepdesign(svydesign(id = ~1, strata = ~stype, weights = ~pw,
                                                                            data = d), type = "JKn")),
  bootstrap = list(name = "apistrat", make = function(d) { set.seed(20261205); as.svrepdesign(
    svydesign(id = ~1, strata = ~stype, weights = ~pw, data = d), type = "bootstrap", replicates = 50) }))
# one replicate design of the list above, with its factors; its data written beside R's replicate weights
rep_design <- function(method) {
  spec <- rep_designs[[method]]
  d <- read.csv(file.path(out, paste0(spec$name, ".csv")))
  update(spec$make(d), stype_f = factor(stype), awards_f = factor(awards))
}
write_replicates <- function(rdes, d, file) {
  w <- weights(rdes, "analysis")
  colnames(w) <- paste0("rw", seq_len(ncol(w)))
  write.csv(cbind(d, w), file.path(out, file), row.names = FALSE)
}
for (method in names(rep_designs)) {
  spec <- rep_designs[[method]]
  d <- read.csv(file.path(out, paste0(spec$name, ".csv")))
  rdes <- spec$make(d)
  write_replicates(rdes, d, paste0("rep_", method, ".csv"))
  write.csv(data.frame(rscales = rdes$rscales, scale = rdes$scale), file.path(out, paste0("rep_", method, "_scales.csv")),
            row.names = FALSE)
  rdes <- update(rdes, yes = as.numeric(sch_wide == 1))
  for (cell in list(c("total", "Total", "TRUE"), c("stype", "E", "stype == 1"), c("stype", "H", "stype == 2"),
                    c("stype", "M", "stype == 3"))) {
    sub <- if (cell[1] == "total") rdes else subset(rdes, eval(parse(text = cell[3])))
    m <- svymean(~api00, sub)
    s <- svymean(~yes, sub)
    rep_rows[[length(rep_rows) + 1]] <- data.frame(method = method, group = cell[1], subgroup = cell[2],
      api00 = coef(m)[[1]], api00_se = SE(m)[[1]], yes = coef(s)[[1]], yes_se = SE(s)[[1]], df = degf(rdes))
  }
}
write.csv(do.call(rbind, rep_rows), file.path(out, "replicates.csv"), row.names = FALSE)

# subgroups compared within a replicate-weight wave
rep_pairs <- list()
for (method in names(rep_designs)) {
  rdes <- rep_design(method)
  by <- svyby(~api00, ~stype_f, rdes, svymean, covmat = TRUE)
  for (pr in list(c(1, 2), c(1, 3), c(2, 3))) {
    w <- rep(0, 3); w[pr[1]] <- 1; w[pr[2]] <- -1
    k <- svycontrast(by, w)
    rep_pairs[[length(rep_pairs) + 1]] <- data.frame(method = method, a = pr[1], b = pr[2],
      diff = as.vector(coef(k)), se = as.vector(SE(k)), F = NA, ddf = NA, p = NA)
  }
  g <- svyglm(api00 ~ stype_f, rdes)
  t <- regTermTest(g, ~stype_f, method = "Wald")
  rep_pairs[[length(rep_pairs) + 1]] <- data.frame(method = method, a = 0, b = 0, diff = NA, se = NA,
    F = as.vector(t$Ftest), ddf = t$ddf, p = as.vector(t$p))
}
write.csv(do.call(rbind, rep_pairs), file.path(out, "replicate_pairs.csv"), row.names = FALSE)

# drivers with replicate weights: svyglm on apiclus1 as JK1
d <- read.csv(file.path(out, "drivers_apiclus1.csv"))
rdes <- as.svrepdesign(svydesign(id = ~dnum, weights = ~pw, data = d), type = "JK1")
write_replicates(rdes, d, "drivers_rep.csv")
g <- svyglm(api00 ~ ell + meals + mobility, rdes)
write.csv(data.frame(term = names(coef(g)), coefficient = as.vector(coef(g)), se = as.vector(SE(g))),
          file.path(out, "svyglm_rep.csv"), row.names = FALSE)

# a question's answers across a split, with replicate weights
rep_chisq <- list()
for (method in names(rep_designs)) {
  rdes <- rep_design(method)
  k <- svychisq(~stype_f + awards_f, rdes)
  rep_chisq[[length(rep_chisq) + 1]] <- data.frame(method = method, f = as.vector(k$statistic),
    ndf = k$parameter[[1]], ddf = k$parameter[[2]], p = as.vector(k$p.value))
}
write.csv(do.call(rbind, rep_chisq), file.path(out, "svychisq_rep.csv"), row.names = FALSE)

# raking a replicate design: every replicate raked (R's rake on apiclus1 as JK1, to the school
# type and growth target counts of R's own rakecheck test)
d <- read.csv(file.path(out, "apiclus1.csv"))
rdes <- as.svrepdesign(svydesign(id = ~dnum, weights = ~pw, data = d), type = "JK1")
write_replicates(rdes, d, "rep_raked.csv")
rr <- rake(rdes, list(~stype, ~sch_wide), list(data.frame(stype = c(1, 2, 3), Freq = c(4421, 755, 1018)),
                                               data.frame(sch_wide = c(1, 2), Freq = c(5122, 1072))),
           control = list(maxit = 1000, epsilon = 1e-10, verbose = FALSE))
raked <- list()
for (cell in list(c("total", "Total", "TRUE"), c("awards", "Yes", "awards == 1"), c("awards", "No", "awards == 2"))) {
  sub <- if (cell[1] == "total") rr else subset(rr, eval(parse(text = cell[3])))
  m <- svymean(~api00, sub)
  raked[[length(raked) + 1]] <- data.frame(group = cell[1], subgroup = cell[2], api00 = coef(m)[[1]],
                                           api00_se = SE(m)[[1]])
}
write.csv(do.call(rbind, raked), file.path(out, "rep_raked_reference.csv"), row.names = FALSE)

# a panel with replicate weights: the same schools in 1999 and 2000 (api99, api00), each school's
# replicate weights the same in both years; the change, and the change of a gap between school
# types, by svycontrast on svyby(covmat = TRUE)
rep_panel <- list()
for (method in names(rep_designs)) {
  rdes <- rep_design(method)
  tot <- svycontrast(svymean(~api00 + api99, rdes), c(api00 = 1, api99 = -1))
  rep_panel[[length(rep_panel) + 1]] <- data.frame(method = method, what = "change", subgroup = "Total",
    other = "", value = as.vector(coef(tot)), se = as.vector(SE(tot)), df = degf(rdes))
  by <- svyby(~api00 + api99, ~stype_f, rdes, svymean, covmat = TRUE)
  # coef order: api00 for E, H, M, then api99 for E, H, M
  for (k in 1:3) {
    w <- rep(0, 6); w[k] <- 1; w[k + 3] <- -1
    ch <- svycontrast(by, w)
    rep_panel[[length(rep_panel) + 1]] <- data.frame(method = method, what = "change", subgroup = levels(by$stype_f)[k],
      other = "", value = as.vector(coef(ch)), se = as.vector(SE(ch)), df = degf(rdes))
  }
  for (pr in list(c(1, 2), c(1, 3), c(2, 3))) {
    w <- rep(0, 6); w[pr[1]] <- 1; w[pr[2]] <- -1; w[pr[1] + 3] <- -1; w[pr[2] + 3] <- 1
    g <- svycontrast(by, w)
    rep_panel[[length(rep_panel) + 1]] <- data.frame(method = method, what = "gap change",
      subgroup = pr[1], other = pr[2], value = as.vector(coef(g)), se = as.vector(SE(g)), df = degf(rdes))
  }
}
write.csv(do.call(rbind, rep_panel), file.path(out, "replicate_panel.csv"), row.names = FALSE)

# replicate weights built from a design with a finite population correction: apistrat as JKn
# with fpc (each replicate's scale carries 1 - n_h / N_h)
d <- read.csv(file.path(out, "apistrat.csv"))
rdes <- as.svrepdesign(svydesign(id = ~1, strata = ~stype, weights = ~pw, fpc = ~fpc, data = d), type = "JKn")
write_replicates(rdes, d["snum"], "rep_jkn_fpc.csv")
write.csv(data.frame(rscales = rdes$rscales, scale = rdes$scale), file.path(out, "rep_jkn_fpc_scales.csv"),
          row.names = FALSE)
