/*
 * A stand-alone copy of the fused pass's common step (the series route of
 * `kernel::fused_close`: d, the degree-5 polynomial, v, the three running
 * sums, the sum of v, the candidate's lane maxima, v stored) on two bf16
 * rows and the reference's f32 exponentials, in five ways of widening the
 * bf16 values. It asks how much the widening itself costs the loop, which
 * a profile of the real loop cannot separate. See DEVELOPERS.md, "AVX-512
 * machine (Zen 5), at 7b699bc".
 *
 *   cc -O2 -mavx512f -mavx512bw -mfma scripts/bench/fused_replica.c -o /tmp/fused_replica -lm
 *   /tmp/fused_replica            (AVX-512 machines only)
 *
 * Ways (all give the loop the same arithmetic per 16 columns):
 *   natural   16 columns per step, widened in column order (vpmovzxwd and a
 *             shift), as klgauge does;
 *   pairs     32 columns per step from one 64-byte load: the even columns
 *             by a shift, the odd ones by an and (no shuffle; the lanes then
 *             hold columns in another order);
 *   x as f32  the reference row read as f32 (already widened), the
 *             candidate's widened in order;
 *   varshift  16 columns per step in the pairs order, shift or and chosen
 *             per step by a variable shift count;
 *   offset    16 columns per step in the pairs order, the even half loaded
 *             one column early so that both halves need only an and.
 *
 * It prints ns per 16 columns (best of five repetitions) and each way's
 * ratio to `natural`, at 8,192 columns (the buffers fit in L2) and 131,072
 * (they do not). A measuring tool, not a test: it asserts nothing.
 */
#include <immintrin.h>
#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <time.h>

static double now(void) {
    struct timespec a;
    clock_gettime(CLOCK_MONOTONIC, &a);
    return a.tv_sec + a.tv_nsec * 1e-9;
}

typedef struct {
    __m512 g, j, t, vb, my;
} Sums;

/* The series-route step on one chunk; returns v. */
static inline __m512 step(__m512 x, __m512 y, __m512 e, Sums *s, __m512 kc, const __m512 *c) {
    __m512 d = _mm512_sub_ps(_mm512_sub_ps(x, y), kc);
    __m512 d2 = _mm512_mul_ps(d, d);
    __m512 mid = _mm512_fmadd_ps(d2, _mm512_fmadd_ps(c[5], d, c[4]), _mm512_fmadd_ps(c[3], d, c[2]));
    __m512 gd = _mm512_mul_ps(d2, _mm512_fmadd_ps(d2, mid, _mm512_fmadd_ps(c[1], d, c[0])));
    __m512 v = _mm512_fmsub_ps(e, gd, _mm512_mul_ps(e, d));
    s->g = _mm512_fmadd_ps(e, gd, s->g);
    s->j = _mm512_fmadd_ps(v, d, s->j);
    s->t = _mm512_fmadd_ps(v, x, s->t);
    s->vb = _mm512_add_ps(s->vb, v);
    s->my = _mm512_max_ps(s->my, y);
    return v;
}

/* The route test the real loop makes on every chunk (never taken here). */
static inline void route(__m512 x, __m512 y, Sums *s) {
    __m512 d = _mm512_sub_ps(x, y);
    if (_mm512_cmp_ps_mask(_mm512_mul_ps(d, d), _mm512_set1_ps(0.25f), _CMP_GE_OQ))
        s->g = _mm512_add_ps(s->g, x);
}

/* One chunk of the loop: the route test, the step, v stored at `v`. */
static inline void chunk(__m512 x, __m512 y, const float *e, float *v, Sums *s, __m512 kc, const __m512 *c) {
    route(x, y, s);
    _mm512_store_ps(v, step(x, y, _mm512_load_ps(e), s, kc, c));
}

static inline __m512 widen(const uint16_t *p) {
    return _mm512_castsi512_ps(_mm512_slli_epi32(_mm512_cvtepu16_epi32(_mm256_loadu_si256((const void *)p)), 16));
}

int main(void) {
    static const float cc[6] = {0.5f, -0.16666667f, 0.041665792f, -0.008333236f, 0.0013982186f, -0.00019944874f};
    static const int32_t counts[2][16] __attribute__((aligned(64))) = {
        {16, 16, 16, 16, 16, 16, 16, 16, 16, 16, 16, 16, 16, 16, 16, 16}, {0}};
    const char *names[5] = {"natural", "pairs", "x as f32", "varshift", "offset"};
    __m512 c[6];
    for (int k = 0; k < 6; k++) c[k] = _mm512_set1_ps(cc[k]);
    const __m512 kc = _mm512_set1_ps(0.001f);
    const __m512i hi = _mm512_set1_epi32((int)0xffff0000u);
    float check = 0;
    for (int size = 0; size < 2; size++) {
        const long n = size ? 131072 : 8192;
        const long reps = (size ? 600000000L : 800000000L) / n;
        /* One column of slack before each bf16 row for `offset`. */
        uint16_t *xa = aligned_alloc(64, 2 * (n + 32)), *ya = aligned_alloc(64, 2 * (n + 32));
        uint16_t *xb = xa + 32, *yb = ya + 32;
        float *xf = aligned_alloc(64, 4 * n), *eb = aligned_alloc(64, 4 * n), *vbuf = aligned_alloc(64, 4 * n);
        for (long i = 0; i < n; i++) {
            /* Invented logits: a smooth row and a candidate close to it. */
            float x = 5.0f * sinf(i * 0.37f), y = x + 0.05f * cosf(i * 1.3f);
            uint32_t ux, uy;
            __builtin_memcpy(&ux, &x, 4);
            __builtin_memcpy(&uy, &y, 4);
            xb[i] = ux >> 16;
            yb[i] = uy >> 16;
            uint32_t wx = (uint32_t)xb[i] << 16;
            __builtin_memcpy(&xf[i], &wx, 4);
            eb[i] = expf(xf[i] - 5.0f);
        }
        double best[5];
        for (int w = 0; w < 5; w++) best[w] = 1e30;
        for (int round = 0; round < 5; round++) {
            for (int w = 0; w < 5; w++) {
                Sums s = {_mm512_setzero_ps(), _mm512_setzero_ps(), _mm512_setzero_ps(), _mm512_setzero_ps(),
                          _mm512_set1_ps(-INFINITY)};
                double t = now();
                for (long r = 0; r < reps; r++) {
                    if (w == 0) {
                        for (long i = 0; i < n; i += 16) {
                            __m512 x = widen(xb + i), y = widen(yb + i);
                            chunk(x, y, eb + i, vbuf + i, &s, kc, c);
                        }
                    } else if (w == 1) {
                        for (long i = 0; i < n; i += 32) {
                            __m512i xr = _mm512_load_si512((const void *)(xb + i));
                            __m512i yr = _mm512_load_si512((const void *)(yb + i));
                            __m512 x0 = _mm512_castsi512_ps(_mm512_slli_epi32(xr, 16));
                            __m512 y0 = _mm512_castsi512_ps(_mm512_slli_epi32(yr, 16));
                            __m512 x1 = _mm512_castsi512_ps(_mm512_and_si512(xr, hi));
                            __m512 y1 = _mm512_castsi512_ps(_mm512_and_si512(yr, hi));
                            chunk(x0, y0, eb + i, vbuf + i, &s, kc, c);
                            chunk(x1, y1, eb + i + 16, vbuf + i + 16, &s, kc, c);
                        }
                    } else if (w == 2) {
                        for (long i = 0; i < n; i += 16) {
                            __m512 x = _mm512_load_ps(xf + i), y = widen(yb + i);
                            chunk(x, y, eb + i, vbuf + i, &s, kc, c);
                        }
                    } else if (w == 3) {
                        for (long i = 0; i < n; i += 16) {
                            long g = i & ~31L;
                            __m512i k = _mm512_load_si512((const void *)counts[(i >> 4) & 1]);
                            __m512 x = _mm512_castsi512_ps(
                                _mm512_and_si512(_mm512_sllv_epi32(_mm512_loadu_si512((const void *)(xb + g)), k), hi));
                            __m512 y = _mm512_castsi512_ps(
                                _mm512_and_si512(_mm512_sllv_epi32(_mm512_loadu_si512((const void *)(yb + g)), k), hi));
                            chunk(x, y, eb + i, vbuf + i, &s, kc, c);
                        }
                    } else {
                        for (long i = 0; i < n; i += 16) {
                            long off = i - 1 - 15 * ((i >> 4) & 1);
                            __m512 x = _mm512_castsi512_ps(_mm512_and_si512(_mm512_loadu_si512((const void *)(xb + off)), hi));
                            __m512 y = _mm512_castsi512_ps(_mm512_and_si512(_mm512_loadu_si512((const void *)(yb + off)), hi));
                            chunk(x, y, eb + i, vbuf + i, &s, kc, c);
                        }
                    }
                }
                t = (now() - t) * 1e9 / (reps * (n / 16.0));
                if (t < best[w]) best[w] = t;
                float o[16];
                _mm512_storeu_ps(o, _mm512_add_ps(_mm512_add_ps(s.g, s.j), _mm512_add_ps(s.t, s.vb)));
                check += o[0] + vbuf[n / 2];
            }
        }
        printf("%ld columns (x, y bf16; e, v f32: %ld KiB)\n", n, (2 * 2 * n + 2 * 4 * n) / 1024);
        printf("  %-10s %12s %12s\n", "way", "ns/16 cols", "natural/way");
        for (int w = 0; w < 5; w++) printf("  %-10s %12.3f %12.3f\n", names[w], best[w], best[0] / best[w]);
        free(xa), free(ya), free(xf), free(eb), free(vbuf);
    }
    printf("(checksum %g)\n", check);
    return 0;
}
