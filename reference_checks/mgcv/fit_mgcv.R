# REML smoothness selection by mgcv for a problem written by make_reference.py.
#
# Usage: Rscript fit_mgcv.R DIR
# DIR holds dims.txt (n_bins n_theta n_penalties n_rows_se), X.bin (the dense constrained
# design, column-major doubles, intercept column first), y.bin (counts), offset.bin,
# S<k>.bin (penalty k, n_theta x n_theta) and rows_se.bin (1-based rows for standard errors
# of the linear predictor). Writes out_*.bin and out_meta.txt into DIR.
#
# The model is the one encodex fits: y ~ Poisson(exp(offset + X theta)), penalty
# sum_k lambda_k theta' S_k theta / 2, every column of X in one parametric term penalised by
# paraPen (penalties used as given: scalePenalty = FALSE), smoothing parameters by REML
# (Laplace approximate restricted marginal likelihood; Wood 2011, JRSS-B 73:3), outer Newton
# to a tight tolerance.
suppressPackageStartupMessages(library(mgcv))
args <- commandArgs(trailingOnly = TRUE)
dir <- args[1]
rd <- function(name, n) readBin(file.path(dir, name), "double", n = n)
dims <- scan(file.path(dir, "dims.txt"), quiet = TRUE)
n <- dims[1]; p <- dims[2]; m <- dims[3]; nr <- dims[4]
X <- matrix(rd("X.bin", n * p), n, p)
y <- rd("y.bin", n)
off <- rd("offset.bin", n)
S <- lapply(seq_len(m), function(k) matrix(rd(sprintf("S%d.bin", k), p * p), p, p))
rows <- as.integer(rd("rows_se.bin", nr))

ctrl <- gam.control(epsilon = 1e-12, scalePenalty = FALSE, maxit = 400,
                    newton = list(conv.tol = 1e-10, maxNstep = 5, maxHalf = 60))
fit <- gam(y ~ X - 1 + offset(off), family = poisson(), method = "REML",
           paraPen = list(X = S), control = ctrl)
vp <- fit$Vp
se_eta <- sqrt(rowSums((X[rows, , drop = FALSE] %*% vp) * X[rows, , drop = FALSE]))

wr <- function(name, v) writeBin(as.double(v), file.path(dir, name))
wr("out_sp.bin", fit$sp)
wr("out_edf.bin", fit$edf)                 # per coefficient, as ordered in X
wr("out_coef.bin", coef(fit))
wr("out_se_coef.bin", sqrt(diag(vp)))
wr("out_se_eta.bin", se_eta)
wr("out_score.bin", fit$gcv.ubre)          # the REML score (minus the log criterion)
wr("out_grad.bin", fit$outer.info$grad)
wr("out_hess.bin", fit$outer.info$hess)     # of the REML score in log lambda
writeLines(c(as.character(packageVersion("mgcv")), R.version.string,
             as.character(fit$outer.info$conv), as.character(fit$outer.info$iter)),
           file.path(dir, "out_meta.txt"))
