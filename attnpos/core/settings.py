"""The default settings of the stages that the command line also shows, in one torch-free place (the stages and
their commands read the same numbers). Judgement calls that turn numbers into words are in
:mod:`attnpos.core.thresholds`."""

#: bootstrap resamples over texts for the score split's intervals (attnpos scan --boot)
SCAN_BOOT = 100

#: random sequences of the induction test (each repeated twice); enough that the standard error of every head's
#: score is at most 0.02 on the reference models (measured: see the README's induction section)
INDUCTION_SEQUENCES = 16

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

#: sequences cut from the texts, at most (attnpos stretch --sequences); each variant reads all of them
STRETCH_SEQUENCES = 8
#: bootstrap resamples over sequences for the loss and head-statistic intervals (attnpos stretch --boot)
STRETCH_BOOT = 200
#: texts (cut to the training length) on which the RoPE bands of the unscaled model are measured
STRETCH_BAND_TEXTS = 4
#: the dtypes weights can be kept in (attnpos scan --dtype); the first is the default. Attention scores are always
#: computed and reduced in float32, whatever the weights' dtype.
DTYPES = ("float32", "bfloat16", "float16")
#: bootstrap resamples per checkpoint in a sweep (attnpos sweep --boot): the timeline reads point values, so none
#: by default (a sweep of many checkpoints stays a sweep of scans, not of bootstraps)
SWEEP_BOOT = 0
#: worker processes of the local cluster a sweep starts (attnpos sweep --workers), one thread each
SWEEP_WORKERS = 2
