# Reference estimates for Trialogue's effects analysis, from R's estimatr.
# Usage: Rscript estimatr.R FIXTURE.csv OUT.csv
# FIXTURE.csv has one row per respondent with an outcome: rid, grp (the arm,
# or "control" for the pooled control arms), stratum, age, stance, pre, post.
# OUT.csv has one row per specification and treatment term.
suppressPackageStartupMessages(library(estimatr))
args <- commandArgs(trailingOnly = TRUE)
d <- read.csv(args[1], stringsAsFactors = FALSE)
arms <- setdiff(unique(d$grp), "control")
arms <- arms[order(match(arms, unique(d$grp)))]
d$grp <- factor(d$grp, levels = c("control", sort(arms)))
d$stratum <- factor(d$stratum)
d$stance <- factor(d$stance)
d$change <- d$post - d$pre

out <- list()
keep <- function(spec, fit) {
  tt <- tidy(fit)
  tt <- tt[grepl("^grp", tt$term), ]
  tt <- tt[!grepl(":", tt$term), ]
  data.frame(spec = spec, arm = sub("^grp", "", tt$term), estimate = tt$estimate,
             se = tt$std.error, t = tt$statistic, p = tt$p.value,
             low = tt$conf.low, high = tt$conf.high, df = tt$df,
             p_holm = p.adjust(tt$p.value, method = "holm"))
}
out[[1]] <- keep("flat-none", lm_robust(post ~ grp, data = d, se_type = "HC2"))
out[[2]] <- keep("strata-none", lm_robust(post ~ grp + stratum, data = d, se_type = "HC2"))
out[[3]] <- keep("strata-pre", lm_robust(post ~ grp + pre + stratum, data = d, se_type = "HC2"))
out[[4]] <- keep("strata-lin", lm_lin(post ~ grp, covariates = ~ pre + age + stance + stratum, data = d, se_type = "HC2"))
out[[5]] <- keep("flat-change", lm_robust(change ~ grp, data = d, se_type = "HC2"))
out[[6]] <- keep("flat-lin", lm_lin(post ~ grp, covariates = ~ pre + age, data = d, se_type = "HC2"))
# difference_in_means, one arm against the pooled control at a time:
# its estimate and standard error equal the saturated regression's.
for (a in levels(d$grp)[-1]) {
  sub <- d[d$grp %in% c("control", a), ]
  sub$z <- as.integer(sub$grp == a)
  dim <- tidy(difference_in_means(post ~ z, data = sub))
  out[[length(out) + 1]] <- data.frame(spec = "dim", arm = a, estimate = dim$estimate,
    se = dim$std.error, t = dim$statistic, p = dim$p.value, low = dim$conf.low,
    high = dim$conf.high, df = dim$df, p_holm = NA)
}
res <- do.call(rbind, out)
write.csv(res, args[2], row.names = FALSE)
