"""The fixed scoring code of the C target: the same text for every model, with ``PFX_`` standing
for the model's C prefix and ``PFXU_`` for its upper-case form. :mod:`boxwood_runtime.csource`
writes it under the model's tables; ``boxwood verify`` checks a file's copy against this text
byte for byte, so the only part of a generated file that differs from model to model is the
tables the verifier reads back.

Why this code computes the source's bits (docs/c-target.md):

* a numeric split compares ``v <= t``, then ``v > t``; a NaN fails both and takes the node's
  missing direction, as the pure-Python scorer does;
* float32 models round each input once, ``(double)(float)v``, after an explicit range test
  (a C cast out of float's range is undefined; scikit-learn's float32 cast overflows to
  infinity, so values at or beyond FLT_MAX + half an ulp become infinities here first);
* raw scores start at the base value and add one leaf per tree, in tree order, in double:
  no multiplication meets an addition anywhere in the raw path, so floating-point
  contraction (FMA) has nothing to fuse (the calibration stage's two products that meet an
  addition go through a volatile temporary), and reassociation needs -ffast-math, which the
  file refuses (``__FAST_MATH__``); ``FLT_EVAL_METHOD`` must be 0 (no excess precision);
* every loop is bounded by a table size or by the model's depth; no recursion, no malloc,
  no stdio; only ``P_predict`` and ``P_label`` call libm (exp, pow; expm1 for target steps);
* a regressor's target steps (docs/wrappers.md) run after the post-transform, one IEEE
  operation per step and output; each product or quotient is stored through a volatile
  double before the next step, so no compiler fuses a multiplication with the addition
  after it (scikit-learn's ``y *= scale_; y += mean_`` rounds twice).
"""

ENGINE = r"""
/* ---- scoring code: the same for every model (boxwood verify checks it byte for byte) ---- */
#if defined(__FAST_MATH__)
#error "PFX_: built with -ffast-math (or -Ofast), which reorders additions and breaks NaN tests; the results would not be the source model's"
#endif
#if !defined(FLT_EVAL_METHOD) || FLT_EVAL_METHOD != 0
#error "PFX_: this target evaluates doubles with excess precision (FLT_EVAL_METHOD != 0); use SSE2 or another IEEE double unit"
#endif

#ifndef PFXU_UNSEEN_AS_MISSING
#define PFXU_UNSEEN_AS_MISSING 0 /* 1: an unseen category value is routed as missing, as scikit-learn does */
#endif
#define PFXU_NAN (NAN)
#define PFXU_INF (INFINITY)
#define PFXU_F32_LIMIT 0x1.ffffffp+127 /* FLT_MAX + half an ulp: here and beyond, float rounds to infinity */

/* Turn the record into the values the trees compare; 0 or an error code. */
static int PFX_prepare(const double *x, double *v)
{
    int j;
    for (j = 0; j < PFXU_N_TREE_FEATURES; ++j) {
        double xv;
#if PFXU_HAS_STEPS
        int s;
        xv = x[PFX_source_field[j]];
        for (s = PFX_step_start[j]; s < PFX_step_start[j + 1]; ++s) {
            int known = xv == xv;
            int kind = PFX_step_kind[s];
            if (kind == 0) { /* impute: a NaN becomes the fitted value */
                if (!known) {
                    xv = PFX_step_value[s];
                }
            } else if (kind >= 3) { /* one scaler operation, in float64, in the source's order */
                double c = PFX_step_value[s];
                if ((PFX_step_flags[s] & 4) && (xv > DBL_MAX || xv < -DBL_MAX)) {
                    return PFXU_ERR_INFINITE; /* scikit-learn's scalers refuse infinite input */
                }
                if (kind == 3) {
                    xv = xv - c;
                } else if (kind == 4) {
                    xv = xv / c;
                } else if (kind == 5) {
                    xv = xv * c;
                } else if (kind == 6) {
                    xv = xv + c;
                } else if (xv < c) { /* 7 clip: low bound in step_value, high bound in step_unknown */
                    xv = c;
                } else if (xv > PFX_step_unknown[s]) {
                    xv = PFX_step_unknown[s];
                }
            } else { /* encode (1): a value becomes its position among the categories; lookup (2): the
                        value listed for it */
                int c, first = PFX_step_cat_start[s], count = PFX_step_cat_start[s + 1] - first;
                int found = -1;
                if (!known && (PFX_step_flags[s] & 1)) {
                    xv = PFX_step_missing[s];
                    continue;
                }
                for (c = 0; known && c < count; ++c) {
                    if (PFX_step_cat[first + c] == xv) {
                        found = c;
                        break;
                    }
                }
                if (found >= 0) {
                    xv = kind == 2 ? PFX_step_cat_value[first + found] : (double)found;
                } else if (PFX_step_flags[s] & 2) {
                    return PFXU_ERR_CATEGORY;
                } else {
                    xv = PFX_step_unknown[s];
                }
            }
        }
#else
        xv = x[j];
#endif
        if (xv != xv) {
#if PFXU_MISSING_REJECT
            return PFXU_ERR_MISSING;
#endif
        }
#if PFXU_HAS_CATEGORIES
        else if (PFX_cat_start[j + 1] > PFX_cat_start[j]) {
            int c, found = -1;
            for (c = PFX_cat_start[j]; c < PFX_cat_start[j + 1]; ++c) {
                if (PFX_cat_value[c] == xv) {
                    found = c - PFX_cat_start[j];
                    break;
                }
            }
            if (found >= 0) {
                xv = (double)found;
            } else if (PFXU_UNSEEN_AS_MISSING || PFX_cat_unseen_missing[j]) {
#if PFXU_MISSING_REJECT
                return PFXU_ERR_MISSING;
#else
                xv = PFXU_NAN;
#endif
            } else {
                return PFXU_ERR_CATEGORY;
            }
        }
#endif
#if !PFXU_ACCEPTS_INFINITY
        else if (xv > DBL_MAX || xv < -DBL_MAX) {
            return PFXU_ERR_INFINITE;
        }
#endif
#if PFXU_COMPARE_FLOAT32
        if (xv >= PFXU_F32_LIMIT || xv <= -PFXU_F32_LIMIT) {
#if !PFXU_ACCEPTS_INFINITY
            return PFXU_ERR_INFINITE;
#else
            xv = xv > 0.0 ? PFXU_INF : -PFXU_INF;
#endif
        } else if (xv == xv) {
            xv = (double)(float)xv;
        }
#endif
        v[j] = xv;
    }
    return PFXU_OK;
}

static int PFX_walk(const double *v, double *acc, int nan_possible);

/* Raw scores: base value plus one leaf per tree, in tree order, in double. */
static int PFX_scores(const double *x, double *acc)
{
    double v[PFXU_N_TREE_FEATURES];
    int j, has_nan = 0, rc = PFX_prepare(x, v);
    for (j = 0; j < PFXU_N_TREE_FEATURES; ++j) {
        has_nan |= v[j] != v[j];
    }
    return rc == PFXU_OK ? PFX_walk(v, acc, has_nan) : rc;
}

/* The trees on prepared values (category codes, float-rounded where the model compares in float). */
/* One step down from split node n for the value xv: left when xv <= t, right when xv > t; a
   NaN fails both comparisons and takes the node's missing direction; a categorical split goes
   left when the category code's bit is set. The child is picked with a mask, not a jump: a
   comparison the processor cannot predict costs no pipeline flush. nan_possible = 0 promises
   that xv is not NaN (then xv > t alone decides). */
static long PFX_next(long n, double xv, int nan_possible)
{
    long l = PFX_left[n], go_right;
#if PFXU_HAS_CATEGORIES
    if (PFX_flags[n] & 2) {
        if (xv != xv) {
            go_right = !(PFX_flags[n] & 1);
        } else {
            long code = (long)xv, word = (long)PFX_value[n] + code / 32;
            go_right = !((PFX_catset[word] >> (code % 32)) & 1u);
        }
        return l ^ ((l ^ (long)PFX_right[n]) & -go_right);
    }
#endif
    go_right = xv > PFX_value[n];
    if (nan_possible) {
        int le = xv <= PFX_value[n];
        go_right = !(le | (!le & !go_right & (PFX_flags[n] & 1)));
    }
    return l ^ ((l ^ (long)PFX_right[n]) & -go_right);
}

/* The raw sums of one record's prepared values. Trees go in groups of PFXU_GROUP, stepped
   down together one level at a time so that their walks overlap in the processor; the
   leaves are then added one by one in tree order, so the sums are those of a tree-by-tree
   walk bit for bit. Every loop is bounded by the tables' sizes and the model's depth.
   nan_possible = 0 promises that no value in v is NaN (one comparison per split). */
#define PFXU_GROUP 8
static int PFX_walk(const double *v, double *acc, int nan_possible)
{
    long node[PFXU_GROUP];
    int t0, g, k, d;
    for (k = 0; k < PFXU_N_RAW; ++k) {
        acc[k] = PFXU_COMBINE_MEAN ? 0.0 : PFX_base[k];
    }
    for (t0 = 0; t0 < PFXU_N_TREES; t0 += PFXU_GROUP) {
        int count = PFXU_N_TREES - t0 < PFXU_GROUP ? PFXU_N_TREES - t0 : PFXU_GROUP;
        for (g = 0; g < count; ++g) {
            node[g] = PFX_root[t0 + g];
        }
        for (d = 0; d < PFXU_MAX_DEPTH; ++d) {
            int moved = 0;
            for (g = 0; g < count; ++g) {
                int f = PFX_feature[node[g]];
                if (f >= 0) {
                    node[g] = nan_possible ? PFX_next(node[g], v[f], 1) : PFX_next(node[g], v[f], 0);
                    moved = 1;
                }
            }
            if (!moved) {
                break;
            }
        }
        for (g = 0; g < count; ++g) {
            if (PFX_feature[node[g]] >= 0) {
                return PFXU_ERR_MODEL; /* deeper than the tables say: damaged tables */
            }
            acc[PFX_tree_output[t0 + g]] += PFX_value[node[g]];
        }
    }
#if PFXU_COMBINE_MEAN
    for (k = 0; k < PFXU_N_RAW; ++k) {
        acc[k] = PFX_trees_per_output[k] > 0 ? PFX_base[k] + acc[k] / (double)PFX_trees_per_output[k] : PFX_base[k];
    }
#endif
    return PFXU_OK;
}

/* a calibrated classifier's folds use their softmax only for a probability response */
#define PFXU_USES_SOFTMAX ((PFXU_TRANSFORM == 4 || PFXU_TRANSFORM == 5) && (!PFXU_CALIBRATED || PFXU_CAL_PROBABILITY))
#if PFXU_USES_SOFTMAX || (PFXU_CALIBRATED && PFXU_CAL_ROW_SUM)
/* numpy's pairwise sum of a contiguous row (scikit-learn's softmax adds so), below 129 values. */
static double PFX_block_sum(const double *e, int n)
{
    double r[8], total = 0.0;
    int i, j;
    if (n < 8) {
        for (i = 0; i < n; ++i) {
            total += e[i];
        }
        return total;
    }
    for (j = 0; j < 8; ++j) {
        r[j] = e[j];
    }
    for (i = 8; i < n - n % 8; i += 8) {
        for (j = 0; j < 8; ++j) {
            r[j] += e[i + j];
        }
    }
    total = ((r[0] + r[1]) + (r[2] + r[3])) + ((r[4] + r[5]) + (r[6] + r[7]));
    for (; i < n; ++i) {
        total += e[i];
    }
    return total;
}

/* The same sum for any length: halves (the first a multiple of 8) summed so and added,
   with an explicit stack instead of recursion (depth below 40 for any int length). */
static double PFX_pairwise_sum(const double *e, int n)
{
    int lo[40], len[40], half[40], stage[40], top = 0;
    double left[40], ret = 0.0;
    lo[0] = 0;
    len[0] = n;
    stage[0] = 0;
    while (top >= 0) {
        if (stage[top] == 0) {
            if (len[top] <= 128) {
                ret = PFX_block_sum(e + lo[top], len[top]);
                --top;
                continue;
            }
            half[top] = len[top] / 2 - (len[top] / 2) % 8;
            stage[top] = 1;
            lo[top + 1] = lo[top];
            len[top + 1] = half[top];
            stage[top + 1] = 0;
            ++top;
        } else if (stage[top] == 1) {
            left[top] = ret;
            stage[top] = 2;
            lo[top + 1] = lo[top] + half[top];
            len[top + 1] = len[top] - half[top];
            stage[top + 1] = 0;
            ++top;
        } else {
            ret = left[top] + ret;
            --top;
        }
    }
    return ret;
}
#endif

#if PFXU_USES_SOFTMAX
static void PFX_softmax(double *z, int n)
{
    double top = z[0], total = 0.0;
    int k;
    for (k = 1; k < n; ++k) {
        if (z[k] > top) {
            top = z[k];
        }
    }
    for (k = 0; k < n; ++k) {
        z[k] = exp(z[k] - top);
    }
    if (PFXU_SOFTMAX_PAIRWISE) {
        total = PFX_pairwise_sum(z, n);
    } else {
        for (k = 0; k < n; ++k) {
            total += z[k];
        }
    }
    for (k = 0; k < n; ++k) {
        z[k] = z[k] / total;
    }
}
#endif

#if PFXU_TRANSFORM == 5 && !PFXU_CALIBRATED
/* AdaBoost's decision values: divide by the total weight; two classes: -d0 + d1. */
static void PFX_samme(double *acc)
{
    int k;
    for (k = 0; k < PFXU_N_RAW; ++k) {
        acc[k] = acc[k] / PFXU_WEIGHT_TOTAL;
    }
    if (PFXU_N_RAW == 2) {
        acc[0] = -acc[0] + acc[1];
    }
}
#endif

#if PFXU_CALIBRATED
/* CalibratedClassifierCV (docs/calibration.md): fold f's raw scores are acc[f * FOLD_RAW ..];
   its calibrator for class column c is entry f * per + c of the PFX_cal_ tables (per: 1 for
   two classes, else one per class). Every product that meets an addition goes through a
   volatile temporary, so no compiler can fuse the two into one rounding (FMA). */

/* IsotonicRegression(out_of_bounds="clip").predict as numpy.interp computes it: clipped to
   the knots' range; y[j] at a knot, else slope * (t - x[j]) + y[j]. The search halves a
   knot range each step (bounded by the table size). */
static double PFX_cal_isotonic(double t, int i)
{
    int lo = PFX_cal_knot_start[i], hi = PFX_cal_knot_start[i + 1] - 1;
    volatile double prod;
    double slope, v;
    if (hi == lo) {
        return PFX_cal_y[lo];
    }
    if (t != t) {
        return t;
    }
    if (t <= PFX_cal_x[lo]) {
        return PFX_cal_y[lo];
    }
    if (t >= PFX_cal_x[hi]) {
        return PFX_cal_y[hi];
    }
    while (hi - lo > 1) { /* x[lo] <= t < x[hi] */
        int mid = lo + (hi - lo) / 2;
        if (PFX_cal_x[mid] <= t) {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    if (PFX_cal_x[lo] == t) {
        return PFX_cal_y[lo];
    }
    slope = (PFX_cal_y[lo + 1] - PFX_cal_y[lo]) / (PFX_cal_x[lo + 1] - PFX_cal_x[lo]);
    prod = slope * (t - PFX_cal_x[lo]);
    v = prod + PFX_cal_y[lo];
    if (v != v) {
        prod = slope * (t - PFX_cal_x[lo + 1]);
        v = prod + PFX_cal_y[lo + 1];
        if (v != v && PFX_cal_y[lo] == PFX_cal_y[lo + 1]) {
            v = PFX_cal_y[lo];
        }
    }
    return v;
}

/* _SigmoidCalibration.predict: expit(-(a * t + b)) = 1 / (1 + exp(a * t + b)). */
static double PFX_cal_sigmoid(double t, int i)
{
    volatile double prod = PFX_cal_a[i] * t;
    return 1.0 / (1.0 + exp(prod + PFX_cal_b[i]));
}

/* Fold f's exact values from its raw scores r (AdaBoost: its decision values). */
static void PFX_cal_fold_exact(const double *r, int f, double *d)
{
    int k;
#if PFXU_TRANSFORM == 5
    double e[PFXU_FOLD_RAW];
    for (k = 0; k < PFXU_FOLD_RAW; ++k) {
        e[k] = r[k] / PFX_cal_weight[f];
    }
    if (PFXU_FOLD_RAW == 2) {
        d[0] = -e[0] + e[1];
        return;
    }
    for (k = 0; k < PFXU_FOLD_RAW; ++k) {
        d[k] = e[k];
    }
#else
    (void)f;
    for (k = 0; k < PFXU_FOLD_RAW; ++k) {
        d[k] = r[k];
    }
#endif
}

/* Fold f's response: its decision values, or (PFXU_CAL_PROBABILITY) its probabilities, as its
   classifier's decision_function / predict_proba give them; returns how many. */
static int PFX_cal_response(const double *r, int f, double *d)
{
    int n = PFXU_FOLD_EXACT;
    PFX_cal_fold_exact(r, f, d);
#if PFXU_CAL_PROBABILITY
    {
        int k = 0;
#if PFXU_TRANSFORM == 2
        for (k = 0; k < n; ++k) {
            d[k] = 1.0 / (1.0 + exp(-d[k]));
        }
#elif PFXU_TRANSFORM == 3
        for (k = 0; k < n; ++k) {
            d[k] = 1.0 / (1.0 + exp(-(2.0 * d[k])));
        }
#elif PFXU_TRANSFORM == 4
        PFX_softmax(d, n);
#elif PFXU_TRANSFORM == 5
        if (n == 1) {
            d[1] = d[0] / 2.0;
            d[0] = -d[0] / 2.0;
            n = 2;
        } else {
            for (k = 0; k < n; ++k) {
                d[k] = d[k] / (double)(n - 1);
            }
        }
        PFX_softmax(d, n);
#endif
        (void)k;
    }
#endif
    return n;
}

/* CalibratedClassifierCV.predict_proba: per fold, one calibrator per class on its response
   column (two classes: column 1 from the positive class's response, column 0 = 1 - p1; more:
   divided by numpy's pairwise row sum, 1 / classes where it is 0), values in (1, 1 + 1e-5]
   set to 1; the folds' probabilities added in fold order from 0 and divided by the count. */
static void PFX_cal_proba(const double *acc, double *out)
{
    double resp[PFXU_FOLD_RAW + 1], p[PFXU_N_CAL_CLASSES];
    int f, c, j, per = PFXU_N_CAL_CLASSES == 2 ? 1 : PFXU_N_CAL_CLASSES;
    for (j = 0; j < PFXU_N_CAL_CLASSES; ++j) {
        out[j] = 0.0;
    }
    for (f = 0; f < PFXU_N_FOLDS; ++f) {
        int n = PFX_cal_response(acc + f * PFXU_FOLD_RAW, f, resp);
        const double *t = resp + (n - per); /* two classes: the last column only */
        for (c = 0; c < per; ++c) {
            int i = f * per + c;
            p[PFXU_N_CAL_CLASSES == 2 ? c + 1 : c] = PFX_cal_method[i] == 0 ? PFX_cal_isotonic(t[c], i)
                                                                           : PFX_cal_sigmoid(t[c], i);
        }
#if PFXU_CAL_ROW_SUM
        {
            double s = PFX_pairwise_sum(p, PFXU_N_CAL_CLASSES);
            for (j = 0; j < PFXU_N_CAL_CLASSES; ++j) {
                p[j] = s != 0.0 ? p[j] / s : 1.0 / (double)PFXU_N_CAL_CLASSES;
            }
        }
#else
        p[0] = 1.0 - p[1];
#endif
        for (j = 0; j < PFXU_N_CAL_CLASSES; ++j) {
            if (1.0 < p[j] && p[j] <= 1.0 + 1e-5) {
                p[j] = 1.0;
            }
            out[j] += p[j];
        }
    }
    for (j = 0; j < PFXU_N_CAL_CLASSES; ++j) {
        out[j] = out[j] / (double)PFXU_N_FOLDS;
    }
}

/* Every fold's exact values, fold after fold. */
static void PFX_cal_exact(const double *acc, double *raw)
{
    int f;
    for (f = 0; f < PFXU_N_FOLDS; ++f) {
        PFX_cal_fold_exact(acc + f * PFXU_FOLD_RAW, f, raw + f * PFXU_FOLD_EXACT);
    }
}
#endif

/* The values a device reproduces bit for bit: raw scores (AdaBoost: its decision values). */
static void PFX_exact(const double *acc, double *raw)
{
#if PFXU_CALIBRATED
    PFX_cal_exact(acc, raw);
#else
    double d[PFXU_N_RAW];
    int k;
    for (k = 0; k < PFXU_N_RAW; ++k) {
        d[k] = acc[k];
    }
#if PFXU_TRANSFORM == 5
    PFX_samme(d);
#endif
    for (k = 0; k < PFXU_N_OUTPUTS; ++k) {
        raw[k] = d[k];
    }
#endif
}

#if PFXU_N_TARGET_STEPS > 0
/* A regressor's target steps, after the post-transform, in order, for every output: 0 exp,
   1 expm1, 2 multiply, 3 add, 4 subtract, 5 divide by the output's constant. */
static void PFX_target(double *out)
{
    int s, k;
    volatile double t;
    for (s = 0; s < PFXU_N_TARGET_STEPS; ++s) {
        for (k = 0; k < PFXU_N_RAW; ++k) {
            double c = PFX_target_value[s * PFXU_N_RAW + k];
            switch (PFX_target_op[s]) {
            case 0:
                t = exp(out[k]);
                break;
            case 1:
                t = expm1(out[k]);
                break;
            case 2:
                t = out[k] * c;
                break;
            case 3:
                t = out[k] + c;
                break;
            case 4:
                t = out[k] - c;
                break;
            default:
                t = out[k] / c;
                break;
            }
            out[k] = t;
        }
    }
}
#endif

/* Predictions or class probabilities from raw scores. */
static void PFX_transform(const double *acc, double *out)
{
#if PFXU_CALIBRATED
    PFX_cal_proba(acc, out);
#else
    int k;
    for (k = 0; k < PFXU_N_RAW; ++k) {
        out[k] = acc[k];
    }
#if PFXU_TRANSFORM == 1
    for (k = 0; k < PFXU_N_RAW; ++k) {
        out[k] = exp(out[k]);
    }
#elif PFXU_TRANSFORM == 2
    for (k = 0; k < PFXU_N_RAW; ++k) {
        out[k] = 1.0 / (1.0 + exp(-out[k]));
    }
#elif PFXU_TRANSFORM == 3
    for (k = 0; k < PFXU_N_RAW; ++k) {
        out[k] = 1.0 / (1.0 + exp(-(2.0 * out[k])));
    }
#elif PFXU_TRANSFORM == 4
    PFX_softmax(out, PFXU_N_RAW);
#elif PFXU_TRANSFORM == 5
    PFX_samme(out);
    if (PFXU_N_RAW == 2) {
        out[1] = out[0] / 2.0;
        out[0] = -out[0] / 2.0;
    } else {
        for (k = 0; k < PFXU_N_RAW; ++k) {
            out[k] = out[k] / (double)(PFXU_N_RAW - 1);
        }
    }
    PFX_softmax(out, PFXU_N_RAW);
#elif PFXU_TRANSFORM == 6
    out[0] = -pow(2.0, -(PFXU_DENOMINATOR != 0.0 ? out[0] / PFXU_DENOMINATOR : 1.0));
#endif
#if PFXU_N_TARGET_STEPS > 0
    PFX_target(out);
#endif
#endif
}

#if PFXU_TASK != 0
/* The predicted class's index (outlier detectors: 0 for -1, 1 for 1). */
static int PFX_pick(const double *acc)
{
    int best = 0;
#if PFXU_CALIBRATED
    double p[PFXU_N_CAL_CLASSES];
    int k;
    PFX_cal_proba(acc, p); /* the first of the largest probabilities */
    for (k = 1; k < PFXU_N_CAL_CLASSES; ++k) {
        if (p[k] > p[best]) {
            best = k;
        }
    }
#elif PFXU_TASK == 2
    double score[1];
    PFX_transform(acc, score);
    best = score[0] - PFXU_OFFSET >= 0.0;
#elif PFXU_BINARY_RULE == 1
    best = acc[0] > 0.0;
#elif PFXU_BINARY_RULE == 2
    best = acc[0] >= 0.0;
#else
    double d[PFXU_N_RAW];
    int k;
    PFX_exact(acc, d);
    if (PFXU_TRANSFORM == 5 && PFXU_N_RAW == 2) {
        return d[0] > 0.0;
    }
    for (k = 1; k < PFXU_N_RAW; ++k) {
        if (d[k] > d[best]) {
            best = k;
        }
    }
#endif
    return best;
}
#endif

int PFX_raw(const double *x, double *raw)
{
    double acc[PFXU_N_RAW];
    int rc = PFX_scores(x, acc);
    if (rc == PFXU_OK) {
        PFX_exact(acc, raw);
    }
    return rc;
}

int PFX_predict(const double *x, double *out)
{
    double acc[PFXU_N_RAW];
    int rc = PFX_scores(x, acc);
    if (rc == PFXU_OK) {
        PFX_transform(acc, out);
    }
    return rc;
}

#if PFXU_TASK != 0
int PFX_label(const double *x, int *label)
{
    double acc[PFXU_N_RAW];
    int rc = PFX_scores(x, acc);
    if (rc == PFXU_OK) {
        *label = PFX_pick(acc);
    }
    return rc;
}
#endif

size_t PFX_score_many(size_t n, const double *x, double *raw, double *out, int *label, int *status)
{
    double acc[PFXU_N_RAW], exact[PFXU_N_RAW];
    size_t i, failed = 0;
    int k;
    for (i = 0; i < n; ++i) {
        int rc = PFX_scores(x + i * PFXU_N_FEATURES, acc);
        if (rc != PFXU_OK) {
            ++failed;
        } else {
            PFX_exact(acc, exact);
        }
        for (k = 0; raw && k < PFXU_N_OUTPUTS; ++k) {
            raw[i * PFXU_N_OUTPUTS + k] = rc == PFXU_OK ? exact[k] : PFXU_NAN;
        }
        if (out && rc == PFXU_OK) {
            PFX_transform(acc, out + i * PFXU_N_PREDICTIONS);
        }
        for (k = 0; out && rc != PFXU_OK && k < PFXU_N_PREDICTIONS; ++k) {
            out[i * PFXU_N_PREDICTIONS + k] = PFXU_NAN;
        }
        if (label) {
#if PFXU_TASK != 0
            label[i] = rc == PFXU_OK ? PFX_pick(acc) : -1;
#else
            label[i] = -1;
#endif
        }
        if (status) {
            status[i] = rc;
        }
    }
    return failed;
}

/* The raw sums for n rows of prepared values (PFXU_N_TREE_FEATURES each): the native batch
   engine's entry point (boxwood_runtime.native). Returns 0, or nonzero when a walk met damaged
   tables. Rows go in blocks of PFXU_BLOCK, and each tree steps the whole block down one level
   at a time (the walks of different rows overlap in the processor); each row still adds its
   leaves in tree order, so the sums are PFX_walk's bit for bit. */
#define PFXU_BLOCK 64
size_t PFX_walk_many(size_t n, const double *v, double *sums)
{
    long node[PFXU_BLOCK];
    int active[PFXU_BLOCK];
    size_t start, failed = 0;
    for (start = 0; start < n; start += PFXU_BLOCK) {
        const double *vb = v + start * PFXU_N_TREE_FEATURES;
        double *sb = sums + start * PFXU_N_RAW;
        int r, m = n - start < PFXU_BLOCK ? (int)(n - start) : PFXU_BLOCK;
        int t, k, d, has_nan = 0;
        for (r = 0; r < m * PFXU_N_TREE_FEATURES; ++r) {
            has_nan |= vb[r] != vb[r];
        }
        for (r = 0; r < m; ++r) {
            for (k = 0; k < PFXU_N_RAW; ++k) {
                sb[r * PFXU_N_RAW + k] = PFXU_COMBINE_MEAN ? 0.0 : PFX_base[k];
            }
        }
        for (t = 0; t < PFXU_N_TREES; ++t) {
            int n_active = m;
            for (r = 0; r < m; ++r) {
                node[r] = PFX_root[t];
                active[r] = r;
            }
            /* each level steps only the rows still at a split (deep, lopsided trees) */
            for (d = 0; d < PFXU_MAX_DEPTH && n_active > 0; ++d) {
                int a, kept = 0;
                for (a = 0; a < n_active; ++a) {
                    int row = active[a], f = PFX_feature[node[row]];
                    if (f >= 0) {
                        double xv = vb[row * PFXU_N_TREE_FEATURES + f];
                        node[row] = has_nan ? PFX_next(node[row], xv, 1) : PFX_next(node[row], xv, 0);
                        active[kept++] = row;
                    }
                }
                n_active = kept;
            }
            for (r = 0; r < m; ++r) {
                if (PFX_feature[node[r]] >= 0) {
                    ++failed; /* deeper than the tables say: damaged tables (the caller raises) */
                    continue;
                }
                sb[r * PFXU_N_RAW + PFX_tree_output[t]] += PFX_value[node[r]];
            }
        }
#if PFXU_COMBINE_MEAN
        for (r = 0; r < m; ++r) {
            for (k = 0; k < PFXU_N_RAW; ++k) {
                double *a = sb + r * PFXU_N_RAW + k;
                *a = PFX_trees_per_output[k] > 0 ? PFX_base[k] + *a / (double)PFX_trees_per_output[k] : PFX_base[k];
            }
        }
#endif
    }
    return failed;
}
"""
