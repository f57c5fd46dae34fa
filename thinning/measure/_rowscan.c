/* The per-row pass of the edge measurement, compiled (see thinning/measure/compiled.py).
 *
 * Plain C functions on C arrays, called through ctypes (which releases the GIL
 * for the call, so a block is measured while the decoding threads go on). What they compute
 * is the numpy path of thinning/measure/rows.py, profile.py and neck.py, row by row: the flicker gain
 * of each frame, each row's dark extent against the threshold map, the deficit integrated
 * over the two edge zones (one window for a thin row), the rim level of thick steady rows,
 * and the faint trace of rows without a clear shadow (scan_rows); then the end bodies, the
 * free span, the axis and the quadratic neck fit of each frame (necks).
 *
 * Built as an optional extension module (setup.py); the tiny module init below only lets
 * Python find the file.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

#if defined(__SSE2__) && (defined(__GNUC__) || defined(__clang__)) && !defined(ROWSCAN_NO_SIMD)
#include <emmintrin.h>
#define ROWSCAN_SSE2 1
#endif

#define BRIDGE_PX 3

/* The first and the last column of a row darker than its threshold (w, or -1, when none): the
 * dark extent of the row, searched from each end, sixteen 8-bit (eight 16-bit) pixels at a time
 * where the processor has SSE2. */
static int64_t first_dark_u8(const uint8_t *row, const uint8_t *t, int64_t w)
{
    int64_t c = 0;
#ifdef ROWSCAN_SSE2
    for (; c + 16 <= w; c += 16) {
        __m128i a = _mm_loadu_si128((const __m128i *)(row + c));
        __m128i b = _mm_loadu_si128((const __m128i *)(t + c));
        unsigned dark = ~(unsigned)_mm_movemask_epi8(_mm_cmpeq_epi8(_mm_max_epu8(a, b), a)) & 0xFFFFu;
        if (dark) return c + __builtin_ctz(dark);
    }
#endif
    for (; c < w; c++)
        if (row[c] < t[c]) return c;
    return w;
}

static int64_t last_dark_u8(const uint8_t *row, const uint8_t *t, int64_t w)
{
    int64_t c = w; /* columns [0, c) not yet searched */
#ifdef ROWSCAN_SSE2
    for (; c >= 16; c -= 16) {
        __m128i a = _mm_loadu_si128((const __m128i *)(row + c - 16));
        __m128i b = _mm_loadu_si128((const __m128i *)(t + c - 16));
        unsigned dark = ~(unsigned)_mm_movemask_epi8(_mm_cmpeq_epi8(_mm_max_epu8(a, b), a)) & 0xFFFFu;
        if (dark) return c - 16 + (31 - __builtin_clz(dark));
    }
#endif
    for (c = c - 1; c >= 0; c--)
        if (row[c] < t[c]) return c;
    return -1;
}

static int64_t first_dark_u16(const uint16_t *row, const uint16_t *t, int64_t w)
{
    int64_t c = 0;
#ifdef ROWSCAN_SSE2
    const __m128i zero = _mm_setzero_si128();
    for (; c + 8 <= w; c += 8) {
        __m128i a = _mm_loadu_si128((const __m128i *)(row + c));
        __m128i b = _mm_loadu_si128((const __m128i *)(t + c));
        /* a < b exactly where the saturated difference b - a is not zero */
        unsigned dark = ~(unsigned)_mm_movemask_epi8(_mm_cmpeq_epi16(_mm_subs_epu16(b, a), zero)) & 0xFFFFu;
        if (dark) return c + __builtin_ctz(dark) / 2;
    }
#endif
    for (; c < w; c++)
        if (row[c] < t[c]) return c;
    return w;
}

static int64_t last_dark_u16(const uint16_t *row, const uint16_t *t, int64_t w)
{
    int64_t c = w;
#ifdef ROWSCAN_SSE2
    const __m128i zero = _mm_setzero_si128();
    for (; c >= 8; c -= 8) {
        __m128i a = _mm_loadu_si128((const __m128i *)(row + c - 8));
        __m128i b = _mm_loadu_si128((const __m128i *)(t + c - 8));
        unsigned dark = ~(unsigned)_mm_movemask_epi8(_mm_cmpeq_epi16(_mm_subs_epu16(b, a), zero)) & 0xFFFFu;
        if (dark) return c - 8 + (31 - __builtin_clz(dark)) / 2;
    }
#endif
    for (c = c - 1; c >= 0; c--)
        if (row[c] < t[c]) return c;
    return -1;
}

/* First and last column of the dark run holding the row's darkest pixel (darkness = -I / light
 * field: larger is darker, first maximum wins). Runs closer than BRIDGE_PX, separated by a gap
 * narrower than a quarter of the narrower run beside it, or by a gap whose mean deficit
 * 1 + darkness / gain is at least `dim` (the bright lens band of a refracting thread, which
 * still loses light, unlike the background beside a speck) are one run. When the darkest
 * pixel lies in a gap, the whole extent lo..hi is kept. */
static void main_run(const unsigned char *mask, const float *darkness, int64_t lo, int64_t hi,
                     double gain, double dim, int64_t *out_lo, int64_t *out_hi)
{
    int64_t darkest = lo;
    for (int64_t c = lo + 1; c <= hi; c++)
        if (darkness[c] > darkness[darkest]) darkest = c;
    int64_t run_start = -1, run_stop = -1, c = lo;
    while (c <= hi) {
        if (!mask[c]) { c++; continue; }
        int64_t start = c;
        while (c <= hi && mask[c]) c++;
        int64_t stop = c - 1;
        if (run_start < 0) { run_start = start; run_stop = stop; continue; }
        int64_t gap = start - run_stop - 1;
        int64_t narrower = run_stop - run_start + 1 < stop - start + 1 ? run_stop - run_start + 1
                                                                       : stop - start + 1;
        double gap_deficit = 0.0;
        for (int64_t g = run_stop + 1; g < start; g++) gap_deficit += 1.0 + darkness[g] / gain;
        gap_deficit /= (double)(gap > 0 ? gap : 1);
        if (gap <= BRIDGE_PX || gap <= 0.25 * narrower || gap_deficit >= dim) {
            run_stop = stop;
        } else {
            if (run_start <= darkest && darkest <= run_stop) {
                *out_lo = run_start; *out_hi = run_stop; return;
            }
            run_start = start; run_stop = stop;
        }
    }
    if (run_start <= darkest && darkest <= run_stop) {
        *out_lo = run_start; *out_hi = run_stop; return;
    }
    *out_lo = lo; *out_hi = hi;
}

static int compare_double(const void *a, const void *b)
{
    double x = *(const double *)a, y = *(const double *)b;
    return (x > y) - (x < y);
}

#define DEFINE_KERNELS(SUFFIX, PIXEL)                                                           \
                                                                                                \
/* Deficit summed over columns [first, stop) of a row (from column 0 on), its first moment in   \
 * zone steps (step s0 at column `first`) and its peak; pixels at saturation carry none. */    \
static inline void zone_sums_##SUFFIX(const PIXEL *row, const float *inv, int64_t first,        \
                                      int64_t stop, int64_t s0, float factor, float s32,        \
                                      double saturation, double *sum, double *moment,           \
                                      float *top)                                               \
{                                                                                               \
    double total = 0.0, first_moment = 0.0;                                                     \
    float peak = *top;                                                                          \
    for (int64_t col = first > 0 ? first : 0; col < stop; col++) {                              \
        PIXEL v = row[col];                                                                     \
        float d = (double)v >= saturation ? 0.0f : ((float)v * inv[col]) * factor + s32;       \
        total += d;                                                                             \
        first_moment += (double)(s0 + col - first) * d;                                         \
        peak = d > peak ? d : peak;                                                             \
    }                                                                                           \
    *sum += total;                                                                              \
    *moment += first_moment;                                                                    \
    *top = peak;                                                                                \
}                                                                                               \
                                                                                                \
/* Flicker gain (upper median of the margin ratios of gain_rows) of each frame, and whether a   \
 * margin pixel of those rows clips (then the caller judges the gain by the unclipped rows). */ \
int frame_gains_##SUFFIX(const PIXEL *const *bands, int64_t stride, int64_t nb, int64_t n,      \
                         int64_t w,                                                             \
                         const int64_t *gain_rows, int64_t g, const double *margin_light,       \
                         int64_t k, double saturation, double *gains, unsigned char *clipped)   \
{                                                                                               \
    double *ratio = malloc((g > 0 ? g : 1) * sizeof(double));                                   \
    if (!ratio) return -1;                                                                      \
    for (int64_t b = 0; b < nb; b++) {                                                          \
        const PIXEL *frame = bands[b];                                                          \
        clipped[b] = 0;                                                                         \
        for (int64_t i = 0; i < g; i++) {                                                       \
            const PIXEL *row = frame + gain_rows[i] * stride;                                   \
            int64_t total = 0;                                                                  \
            PIXEL top = 0;                                                                      \
            for (int64_t c = 0; c < k; c++) {                                                   \
                total += (int64_t)row[c] + (int64_t)row[w - k + c];                             \
                top = row[c] > top ? row[c] : top;                                              \
                top = row[w - k + c] > top ? row[w - k + c] : top;                              \
            }                                                                                   \
            ratio[i] = (double)total / margin_light[gain_rows[i]];                              \
            if ((double)top >= saturation) clipped[b] = 1;                                      \
        }                                                                                       \
        if (g > 0) {                                                                            \
            qsort(ratio, g, sizeof(double), compare_double);                                    \
            gains[b] = ratio[g / 2];                                                            \
        } else {                                                                                \
            gains[b] = 1.0;                                                                     \
        }                                                                                       \
    }                                                                                           \
    free(ratio);                                                                                \
    return 0;                                                                                   \
}                                                                                               \
                                                                                                \
/* Rows of one frame without a clear shadow: their faintest trace of one (set in place). */     \
static void faint_rows_##SUFFIX(const PIXEL *block, int64_t stride, int64_t n, int64_t w,       \
                                const float *inv_light,                                         \
                                const unsigned char *has, double *centre, double *peak,         \
                                double *cut, double gain, double scale, int64_t margin)         \
{                                                                                               \
    int64_t count = 0;                                                                          \
    double ym = 0.0, cm = 0.0;                                                                  \
    for (int64_t r = 0; r < n; r++)                                                             \
        if (has[r]) { count++; ym += r; cm += centre[r]; }                                      \
    if (count == n) return;                                                                     \
    float s32 = (float)scale, g32 = (float)gain;                                                \
    for (int64_t r = 0; r < n; r++) {                                                           \
        if (has[r]) continue;                                                                   \
        float low = INFINITY;                                                                   \
        for (int64_t c = 0; c < w; c++) {                                                       \
            float v = (float)block[r * stride + c] * inv_light[r * w + c];                      \
            low = v < low ? v : low;                                                            \
        }                                                                                       \
        peak[r] = (1.0f - low / g32) * s32;                                                     \
    }                                                                                           \
    if (count < 5) return;                                                                      \
    ym /= count;                                                                                \
    cm /= count;                                                                                \
    double syy = 0.0, syc = 0.0;                                                                \
    for (int64_t r = 0; r < n; r++)                                                             \
        if (has[r]) { syy += (r - ym) * (r - ym); syc += (r - ym) * (centre[r] - cm); }         \
    double slope = syc / (syy > 1e-9 ? syy : 1e-9);                                             \
    if (!(isfinite(slope) && isfinite(cm))) return;                                             \
    int64_t half = margin + 2;                                                                  \
    for (int64_t r = 0; r < n; r++) {                                                           \
        if (has[r]) continue;                                                                   \
        double line = cm + slope * (r - ym);                                                    \
        if (!(fabs(line) < 1e15)) continue; /* far outside the band (and no integer overflow) */  \
        int64_t guess = (int64_t)rint(line);                                                    \
        if (guess - half < 0 || guess + half >= w) continue;                                    \
        double total = 0.0, moment = 0.0;                                                       \
        for (int64_t c = guess - half; c <= guess + half; c++) {                                \
            float d = (1.0f - ((float)block[r * stride + c] * inv_light[r * w + c]) / g32) * s32; \
            total += d;                                                                         \
            moment += d * (double)c;                                                            \
        }                                                                                       \
        cut[r] = total;                                                                         \
        centre[r] = moment / total;                                                             \
    }                                                                                           \
}                                                                                               \
                                                                                                \
/* Row measurements of a block of bands (bands[b]: first pixel of frame b's band, rows `stride`  \
 * pixels apart); outputs (frame, row), preset by the caller:                                   \
 * has = 0, centre = cut = rim_ratio = NaN, core_n = 0, truncated = 0, light = 1. */            \
int scan_rows_##SUFFIX(const PIXEL *const *bands, int64_t stride, int64_t nb, int64_t n,        \
                       int64_t w,                                                               \
                       const PIXEL *thresholds, const int64_t *map_of_frame,                    \
                       const float *inv_light, const double *gains,                             \
                       double saturation, double scale, int64_t margin, int64_t core,           \
                       double dim,                                                              \
                       unsigned char *has, double *peak, double *centre, double *core_n,        \
                       double *cut, unsigned char *truncated, double *rim_ratio, double *light) \
{                                                                                               \
    int64_t zone = margin + core;                                                               \
    unsigned char *mask = malloc(w); /* the dark pixels of a row with a gap, where needed */    \
    float *darkness = malloc(w * sizeof(float));                                                \
    int64_t *lj = malloc(n * sizeof(int64_t)), *rj = malloc(n * sizeof(int64_t));               \
    unsigned char *thick = malloc(n);                                                           \
    if (!mask || !darkness || !lj || !rj || !thick) {                                           \
        free(mask); free(darkness); free(lj); free(rj); free(thick);                            \
        return -1;                                                                              \
    }                                                                                           \
    float s32 = (float)scale;                                                                   \
    for (int64_t b = 0; b < nb; b++) {                                                          \
        const PIXEL *frame = bands[b];                                                          \
        const PIXEL *thr = thresholds + map_of_frame[b] * n * w;                                \
        double gain = gains[b];                                                                 \
        float g32 = (float)gain, factor = (float)(-scale / gain);                               \
        int64_t o = b * n; /* offset of this frame's rows in the outputs */                    \
        for (int64_t r = 0; r < n; r++) {                                                       \
            const PIXEL *row = frame + r * stride, *t = thr + r * w;                            \
            const float *inv = inv_light + r * w;                                               \
            light[o + r] = (row[0] < t[0] && row[w - 1] < t[w - 1]) ? 0.0 : 1.0;                \
            int64_t left = first_dark_##SUFFIX(row, t, w);                                      \
            if (left == w) { /* no shadow on this row: its faint trace, below */                \
                lj[r] = 0; rj[r] = w - 1; thick[r] = 0;                                         \
                continue;                                                                       \
            }                                                                                   \
            int64_t right = last_dark_##SUFFIX(row, t, w);                                      \
            int64_t probe = 2 * core < right - left + 1 ? 2 * core : right - left + 1;          \
            for (int64_t s = 0; s < probe; s++) {                                               \
                int64_t head = left + s < w - 1 ? left + s : w - 1;                             \
                int64_t tail = right - s > 0 ? right - s : 0;                                   \
                if (!(row[head] < t[head] && row[tail] < t[tail])) { /* a gap near an edge */    \
                    for (int64_t c = left; c <= right; c++) {                                   \
                        mask[c] = row[c] < t[c];                                                \
                        darkness[c] = -((float)row[c] * inv[c]);                                \
                    }                                                                           \
                    main_run(mask, darkness, left, right, gain, dim, &left, &right);            \
                    break;                                                                      \
                }                                                                               \
            }                                                                                   \
            has[o + r] = 1;                                                                     \
            lj[r] = left; rj[r] = right;                                                        \
            int64_t core_start = left + core, core_stop = right + 1 - core;                     \
            int wide = core_stop >= core_start;                                                 \
            thick[r] = wide;                                                                    \
            int64_t base = left - margin;                                                       \
            int64_t stop = wide ? w : (right + 1 + margin < w ? right + 1 + margin : w);        \
            double left_sum = 0.0, right_sum = 0.0, moment = 0.0;                               \
            float top = 0.0f;                                                                   \
            /* the two zones: columns base + s (s < zone), then (core_stop or base + zone) + s */ \
            int64_t right_start = wide ? core_stop : base + zone;                               \
            zone_sums_##SUFFIX(row, inv, base, base + zone < stop ? base + zone : stop, 0,       \
                               factor, s32, saturation, &left_sum, &moment, &top);              \
            zone_sums_##SUFFIX(row, inv, right_start,                                           \
                               right_start + zone < stop ? right_start + zone : stop, zone,      \
                               factor, s32, saturation, &right_sum, &moment, &top);             \
            double edge_sum = left_sum + right_sum;                                             \
            if (wide) {                                                                         \
                core_n[o + r] = (double)(core_stop - core_start);                               \
                centre[o + r] = 0.5 * ((core_start - 0.5 - left_sum) + (core_stop - 0.5 + right_sum)); \
                peak[o + r] = 1.0;                                                              \
                truncated[o + r] = base < 0 || core_stop + margin > w;                          \
            } else {                                                                            \
                centre[o + r] = base + moment / edge_sum;                                       \
                peak[o + r] = top;                                                              \
                truncated[o + r] = base < 0 || right + 1 + margin > w;                          \
            }                                                                                   \
            cut[o + r] = edge_sum + core_n[o + r];                                              \
        }                                                                                       \
        /* rim level of thick rows whose edges run along the axis */                            \
        for (int64_t r = 2; r < n - 2; r++) {                                                   \
            if (!(thick[r] && has[o + r] && core_n[o + r] > 12)) continue;                      \
            if (llabs(lj[r + 2] - lj[r - 2]) > 1 || llabs(rj[r + 2] - rj[r - 2]) > 1) continue; \
            const PIXEL *row = frame + r * stride;                                              \
            const float *inv = inv_light + r * w;                                               \
            int64_t a0 = lj[r] + core, b0 = rj[r] + 1 - core;                                   \
            float total = (float)row[a0] * inv[a0] + (float)row[a0 + 1] * inv[a0 + 1];          \
            total += (float)row[b0 - 1] * inv[b0 - 1];                                          \
            total += (float)row[b0 - 2] * inv[b0 - 2];                                          \
            rim_ratio[o + r] = (total * 0.25f) / g32;                                           \
        }                                                                                       \
        faint_rows_##SUFFIX(frame, stride, n, w, inv_light, has + o, centre + o, peak + o, cut + o,     \
                            gain, scale, margin);                                               \
    }                                                                                           \
    free(mask); free(darkness); free(lj); free(rj); free(thick);                                \
    return 0;                                                                                   \
}

/* Straight-line direction of the centre line over the rows `use` (lateral px per axial px),
 * kept within `bend` of `base`; `base` with fewer than 5 rows (see edges.axis_slopes). */
static double axis_slope(const double *y, const double *centre, const unsigned char *use, int64_t n,
                         double base, double bend)
{
    int64_t count = 0;
    double mean = 0.0;
    for (int64_t r = 0; r < n; r++)
        if (use[r]) { count++; mean += y[r]; }
    if (count < 5) return base;
    mean /= count;
    double syc = 0.0, syy = 0.0;
    for (int64_t r = 0; r < n; r++)
        if (use[r]) { double dy = y[r] - mean; syc += dy * centre[r]; syy += dy * dy; }
    double slope = syc / syy;
    if (slope < base - bend) slope = base - bend;
    else if (slope > base + bend) slope = base + bend;
    return slope;
}

/* The neck of each frame of a block from its row measurements: edges.profiles_of followed by
 * neck.necks_of, fused (same arithmetic). Inputs (frame, row) as scan_rows gives them, with
 * `fraction` the shadow level over backlight to scale each frame to (NaN: the layout's).
 * end_kind: 0 no body at that end of the axis, 1 a body `end_width` wide, 2 a band-filling one.
 * Outputs per frame. Returns 0, or -1 when a row buffer cannot be allocated. */
int necks(int64_t nb, int64_t n, const double *cut_in, const double *core_n, const double *peak_in,
          const double *centre_in, const unsigned char *truncated, const double *light,
          const double *fraction, double layout_fraction, const int64_t *end_kind,
          const double *end_width, int64_t face_px, double axial0, double band0,
          double present_level, double layout_slope, double bend, double row_noise,
          int64_t max_half, int64_t min_half,
          double *diameter, double *position, double *angle_deg, double *lateral,
          double *min_contrast, int64_t *fit_rows, unsigned char *beads, unsigned char *connected,
          unsigned char *seen, double *gap)
{
    double *cut = malloc(n * sizeof(double)), *smooth = malloc(n * sizeof(double));
    double *y = malloc(n * sizeof(double)), *centre = malloc(n * sizeof(double));
    double *left = malloc(n * sizeof(double)), *peak = malloc(n * sizeof(double));
    unsigned char *body = malloc(n), *valid = malloc(n), *sel = malloc(n);
    if (!cut || !smooth || !y || !centre || !left || !peak || !body || !valid || !sel) {
        free(cut); free(smooth); free(y); free(centre); free(left); free(peak);
        free(body); free(valid); free(sel);
        return -1;
    }
    for (int64_t r = 0; r < n; r++) y[r] = r + axial0;
    for (int64_t b = 0; b < nb; b++) {
        const double *cut0 = cut_in + b * n, *core = core_n + b * n, *peak0 = peak_in + b * n;
        const double *lit = light + b * n;
        const unsigned char *trunc = truncated + b * n;
        /* the end bodies: contiguous from each end, as wide as the body or unlit */
        memset(body, 0, n);
        for (int end = 0; end < 2; end++) {
            if (end_kind[end] == 0) continue;
            double limit = end_width[end] - (0.02 * end_width[end] > 1.0 ? 0.02 * end_width[end] : 1.0);
            for (int64_t i = 0; i < n; i++) {
                int64_t r = end == 0 ? i : n - 1 - i;
                int wide = lit[r] < 0.5 * (1.0 + layout_fraction) || (end_kind[end] == 1 && cut0[r] >= limit);
                if (!wide) break;
                body[r] = 1;
            }
        }
        int64_t start = 0, stop = n;
        while (start < n && body[start]) start++;
        int any_body = 0;
        for (int64_t r = 0; r < n; r++) any_body |= body[r];
        if (start == n) {
            stop = n;
        } else {
            stop = n;
            while (stop > 0 && body[stop - 1]) stop--;
        }
        int64_t face = any_body ? face_px : 0;
        int64_t lo = start + (start > 0 ? face : 0), hi = stop - (stop < n ? face : 0);
        /* widths and contrast scaled to this frame's shadow level */
        double f = fraction[b];
        int scaled = isfinite(f) && f != layout_fraction;
        double g = scaled ? (1.0 - layout_fraction) / (1.0 - f) : 1.0;
        int any_free = 0, all_present = 1, any_present = 0;
        for (int64_t r = 0; r < n; r++) {
            cut[r] = scaled ? (cut0[r] - core[r]) * g + core[r] : cut0[r];
            peak[r] = scaled ? peak0[r] * g : peak0[r];
            centre[r] = centre_in[b * n + r] + band0;
            int present = peak[r] > present_level, free_row = lo <= r && r < hi;
            any_present |= present;
            any_free |= free_row;
            if (free_row && !present) all_present = 0;
            valid[r] = free_row && isfinite(cut[r]) && !trunc[r];
        }
        connected[b] = any_free && all_present;
        seen[b] = any_present;
        double first_face = axial0 + start, last_face = axial0 + stop;
        if (body[0] && body[n - 1]) gap[b] = last_face - first_face;
        else if (end_kind[0] != 0 && body[0]) gap[b] = first_face;
        else if (end_kind[1] != 0 && body[n - 1]) gap[b] = last_face;
        else gap[b] = NAN;
        double frame_slope = axis_slope(y, centre, valid, n, layout_slope, bend);
        /* the thinnest rows: widths smoothed over each valid row and its valid neighbours */
        int64_t n_ok = 0;
        for (int64_t r = 0; r < n; r++) {
            n_ok += valid[r];
            if (!valid[r]) { smooth[r] = INFINITY; continue; }
            double total = cut[r], count = 1.0;
            if (r > 0 && valid[r - 1]) { total += cut[r - 1]; count += 1.0; }
            if (r + 1 < n && valid[r + 1]) { total += cut[r + 1]; count += 1.0; }
            smooth[r] = total / count;
        }
        /* a bead: a swelling with clearly thinner thread on both sides */
        double running = INFINITY;
        for (int64_t r = 0; r < n; r++) { running = smooth[r] < running ? smooth[r] : running; left[r] = running; }
        running = INFINITY;
        int bead = 0;
        for (int64_t r = n - 1; r >= 0; r--) {
            running = smooth[r] < running ? smooth[r] : running;
            double thread = left[r] > running ? left[r] : running;
            if (valid[r] && isfinite(thread) && smooth[r] > 1.6 * thread && smooth[r] > thread + 3.0) bead = 1;
        }
        int64_t i0 = 0;
        for (int64_t r = 1; r < n; r++)
            if (smooth[r] < smooth[i0]) i0 = r;
        double w0 = smooth[i0];
        double level = w0 + (3.0 * row_noise > 0.015 * w0 ? 3.0 * row_noise : 0.015 * w0);
        int64_t before = -1, after = n;
        for (int64_t r = i0 - 1; r >= 0; r--)
            if (!(smooth[r] <= level)) { before = r; break; }
        for (int64_t r = i0 + 1; r < n; r++)
            if (!(smooth[r] <= level)) { after = r; break; }
        int64_t wlo = before + 1 > i0 - max_half ? before + 1 : i0 - max_half;
        int64_t whi = after - 1 < i0 + max_half ? after - 1 : i0 + max_half;
        int64_t mid = (wlo + whi) / 2, half = (whi - wlo + 1) / 2; /* 0 <= wlo <= i0 <= whi */
        half = half > min_half ? half : min_half;
        int measured = connected[b] && n_ok >= 3;
        if (!measured) {
            diameter[b] = position[b] = angle_deg[b] = lateral[b] = min_contrast[b] = NAN;
            fit_rows[b] = 0;
            beads[b] = 0;
            continue;
        }
        /* the fit: rows mid ± half, widths across the local axis over those rows */
        int64_t count = 0;
        for (int64_t r = 0; r < n; r++) {
            sel[r] = valid[r] && mid - half <= r && r <= mid + half;
            count += sel[r];
            valid[r] = sel[r] && isfinite(centre[r]); /* from here on: the rows of the local axis */
        }
        double slope = axis_slope(y, centre, valid, n, frame_slope, bend);
        double cosine = 1.0 / sqrt(1.0 + slope * slope);
        double s0 = 0, s1 = 0, s2 = 0, s3 = 0, s4 = 0, t0 = 0, t1 = 0, t2 = 0;
        double y_min = INFINITY, y_max = -INFINITY;
        for (int64_t r = 0; r < n; r++) {
            if (!sel[r]) continue;
            double x = (double)(r - i0), x2 = x * x, w = cut[r] * cosine;
            s0 += 1.0; s1 += x; s2 += x2; s3 += x2 * x; s4 += x2 * x2;
            t0 += w; t1 += x * w; t2 += x2 * w;
            y_min = x < y_min ? x : y_min;
            y_max = x > y_max ? x : y_max;
        }
        double det = s4 * (s2 * s0 - s1 * s1) - s3 * (s3 * s0 - s1 * s2) + s2 * (s3 * s1 - s2 * s2);
        double scale_det = fabs(s4 * s2 * s0) > 1e-300 ? fabs(s4 * s2 * s0) : 1e-300;
        int solvable = count >= 5 && fabs(det) >= 1e-12 * scale_det;
        double d, shift = 0.0;
        if (solvable) {
            double a = (t2 * (s2 * s0 - s1 * s1) - s3 * (t1 * s0 - s1 * t0) + s2 * (t1 * s1 - s2 * t0)) / det;
            double bb = (s4 * (t1 * s0 - t0 * s1) - t2 * (s3 * s0 - s1 * s2) + s2 * (s3 * t0 - t1 * s2)) / det;
            double c = (s4 * (s2 * t0 - s1 * t1) - s3 * (s3 * t0 - s2 * t1) + t2 * (s3 * s1 - s2 * s2)) / det;
            double vertex = a > 0 ? -bb / (2.0 * a) : NAN;
            if (isfinite(vertex) && y_min <= vertex && vertex <= y_max) {
                d = c - bb * bb / (4.0 * a);
                shift = vertex;
            } else { /* no minimum inside the window: the fit's lowest point in it */
                double lo_end = a * y_min * y_min + bb * y_min + c, hi_end = a * y_max * y_max + bb * y_max + c;
                d = lo_end < c ? lo_end : c;
                d = hi_end < d ? hi_end : d;
            }
        } else {
            d = t0 / count;
        }
        diameter[b] = d;
        position[b] = y[i0] + shift;
        angle_deg[b] = atan(slope) * (180.0 / 3.14159265358979323846);
        lateral[b] = centre[i0];
        min_contrast[b] = peak[i0];
        fit_rows[b] = count;
        beads[b] = bead;
    }
    free(cut); free(smooth); free(y); free(centre); free(left); free(peak);
    free(body); free(valid); free(sel);
    return 0;
}

DEFINE_KERNELS(u8, uint8_t)
DEFINE_KERNELS(u16, uint16_t)

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_rowscan",
                                    "Compiled row pass of thinning.edges (used through ctypes).",
                                    -1, NULL};

PyMODINIT_FUNC PyInit__rowscan(void) { return PyModule_Create(&module); }
