# lme4's fit of volume_network.csv, written to lme4_volume.csv (tests/test_targets.py).
# Run from this folder with Debian's r-base-core and r-cran-lme4:
#   Rscript lme4_volume.R
suppressMessages(library(lme4))
d <- read.csv("volume_network.csv")
d$unit <- factor(d$unit)
# log_cases centred over the units (its coefficient is unchanged; without centring the optimiser
# stops with a gradient warning)
d$log_cases <- d$log_cases - mean(d$log_cases[!duplicated(d$unit)])
m <- glmer(cbind(events, cases - events) ~ x + log_cases + (1 | unit), data = d, family = binomial)
fe <- fixef(m)
se <- sqrt(diag(as.matrix(vcov(m))))
re <- ranef(m)$unit
units <- d[!duplicated(d$unit), c("unit", "log_cases")]
units <- units[match(rownames(re), as.character(units$unit)), ]
out <- rbind(
  data.frame(name = names(fe), value = unname(fe), se = unname(se)),
  data.frame(name = "tau", value = attr(VarCorr(m)$unit, "stddev"), se = NA),
  data.frame(name = paste0("unit_", rownames(re)), value = fe[["(Intercept)"]] + fe[["log_cases"]] * units$log_cases + re[, 1], se = NA)
)
write.csv(out, "lme4_volume.csv", row.names = FALSE)
cat(sprintf("lme4 %s, R %s\n", packageVersion("lme4"), getRversion()))
