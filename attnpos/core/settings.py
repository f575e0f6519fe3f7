"""The default settings of the stages that the command line also shows, in one torch-free place (the stages and
their commands read the same numbers). Judgement calls that turn numbers into words are in
:mod:`attnpos.core.thresholds`."""

#: bootstrap resamples over texts for the score split's intervals (attnpos scan --boot)
SCAN_BOOT = 100

#: outer folds over texts of the position probes (attnpos probe --folds)
PROBE_FOLDS = 5

#: sequences cut from the texts, at most (attnpos length --sequences)
LENGTH_SEQUENCES = 16
#: about this many query-position bins for the per-head curves (attnpos length --bins)
LENGTH_BINS = 16
#: bootstrap resamples over sequences for the loss intervals (attnpos length --boot)
LENGTH_BOOT = 200

#: how a head's output is replaced (attnpos ablate --how); the first is the default
ABLATION_HOWS = ("mean", "zero")
#: bootstrap resamples over texts for the interval of the change of loss (attnpos ablate --boot)
ABLATION_BOOT = 200

#: training context of the reference models, in tokens (attnpos train --context)
REFERENCE_CONTEXT = 128

#: bootstrap resamples per checkpoint in a sweep (attnpos sweep --boot): the timeline reads point values, so none
#: by default (a sweep of many checkpoints stays a sweep of scans, not of bootstraps)
SWEEP_BOOT = 0
#: worker processes of the local cluster a sweep starts (attnpos sweep --workers), one thread each
SWEEP_WORKERS = 2
