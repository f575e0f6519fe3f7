"""Every threshold that turns a number into a word, in one place.

These are judgement calls, not published constants; each comment says why the value was chosen. Change them
here only: the role specs (:mod:`attnpos.core.roles`) read them, and the README's role table is generated from
those specs.
"""

# previous-token / next-token: at least half of the query's weight on the neighbouring key. Half is the point where
# that one key outweighs all others together (a clear, majority criterion; Clark et al. 2019 and Voita et al. 2019
# describe such heads in trained encoders and translation models).
NEIGHBOUR_MASS = 0.5

# anchor: mean weight on one fixed slot, over queries at least ANCHOR_MIN_DISTANCE tokens away from it (so a head
# that looks a few tokens back is not mistaken for one that looks at a slot), of at least 0.3. In an
# untrained causal model the first token gets about 1/(i+1) (under 0.1 on average for texts of 50+ tokens), so 0.3 is
# well above that default while heads that sink onto the first token (Xiao et al. 2024) exceed it by far.
ANCHOR_WEIGHT = 0.3
ANCHOR_MIN_DISTANCE = 8

# induction: mean weight on the token after the earlier copy of the current token, on random tokens repeated twice
# (Olsson et al. 2022). Uniform attention over a 2×48-token prefix gives about 0.01-0.02; 0.3 means a deliberate copy.
INDUCTION_SCORE = 0.3

# counting: entropy at least 0.9 of log(number of visible keys), i.e. near-uniform over the causal prefix. This is
# the ARCHITECTURE'S DEFAULT: untrained causal models are near-uniform everywhere, so a `counting` head is only
# interesting next to an untrained baseline (see attnpos.probes). Causal models only.
COUNTING_ENTROPY = 0.9

# local: scores fall with distance by at least 0.01 per token (a factor e over 100 tokens, ALiBi units) and the
# distance part explains at least 40% of the within-row variance.
LOCAL_SLOPE = 0.01
LOCAL_SHARE = 0.4

# content: distance, slot and the position pair together explain under 25% and key content plus residual at least
# 60% — and the shift test does not say `absolute` (a head whose weights stay on absolute places when the text
# moves is not following content, whatever the split says).
CONTENT_MAX_POSITIONAL = 0.25
CONTENT_MIN_SHARE = 0.6

# positional: the shift test says `absolute` (an intervention: the head kept looking at the same absolute places),
# or the position-pair part explains at least 40% of the within-row variance (the same bar as `local`'s distance
# share: the largest single part for most heads that have it). A head with scores p_iᵀ W p_j only puts ≥ 0.9 there.
POSITIONAL_PAIR_SHARE = 0.4

# role support: a role is a head's primary role when its criterion holds in at least 90% of the bootstrap resamples
# over texts (the same 90% as the intervals the split reports); when none does, the head is said to sit between
# the two roles it gets most often across resamples.
ROLE_SUPPORT = 0.9

# shift test verdicts (change = mean total-variation distance between a query's weights over the text's own keys,
# before and after the shift; 0 = identical, 1 = disjoint). Under 0.05: the head moved with the text, `relative`;
# over 0.15: it kept looking at the same absolute places, `absolute`; between: `mixed`.
SHIFT_RELATIVE = 0.05
SHIFT_ABSOLUTE = 0.15
# The neutral prefix moves the first token and template slots, but it also changes the context the text is read in
# (later layers see hidden states that attended to the prefix), so in a trained model a head can change without
# being tied to a slot. Measured on the real SmolLM2-135M (30 × 9 RoPE heads, the bundled sample texts, prefix of
# 32 ". " tokens): heads with under 0.2 of their weight on the first token changed by a median 0.23 (90th percentile
# 0.27), the 68 heads with at least half their weight there by 0.62–0.81 (10th–90th percentile), layer 0 (no context
# yet) by 0. The prefix's `absolute` therefore needs a change over 0.4, between the two.
SHIFT_PREFIX_ABSOLUTE = 0.4
SHIFT_OFFSET = 32          # positions added to every position id (or neutral tokens placed before the text)
SHIFT_MAX_TOKENS = 192     # the shift test looks at the first tokens of each text only
SHIFT_MAX_TEXTS = 4

# stretch (attnpos stretch): a head "breaks" under a context-extension variant when its weight-based role changes,
# or when one of these statistics, measured on the queries past the training length under the variant, differs from
# the same head's value on the queries inside the training length of the unscaled model by at least this much AND
# the two 90% bootstrap intervals (sequences resampled) do not overlap. The intervals keep noise from counting as a
# break; the sizes keep a tiny but precisely measured shift from counting as one.
# previous-token mass and first-token (sink) weight: 0.15 of the query's weight, under a third of NEIGHBOUR_MASS —
# a previous-token head at 0.8 that drops to 0.65 still does its job, one that loses 0.15 or more is visibly weaker.
STRETCH_MASS = 0.15
# entropy ratio (1 = uniform over the visible keys): 0.15, a sixth of COUNTING_ENTROPY — the step from a focused head
# (0.3) to a diffuse one (0.45) is about what spreads a clear pattern over many more keys.
STRETCH_ENTROPY = 0.15
# slope of the scores over distance (per token, positive when scores fall): a change of at least half the head's own
# slope at the training length (its distance preference halved or grown by half — the slopes of trained heads span
# more than a factor 10, so a fixed size would flag every steep head and none of the flat ones), and never less than
# LOCAL_SLOPE, the whole criterion that makes a head local.
STRETCH_SLOPE = LOCAL_SLOPE
STRETCH_SLOPE_RATIO = 0.5
