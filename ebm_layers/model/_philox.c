/* Philox4x32-10 uniforms and the fused Bernoulli comparison of ebm_layers (see native.py for the
 * stream's definition). Philox: Salmon, Moraes, Dror, Shaw, "Parallel Random Numbers: As Easy as
 * 1, 2, 3", SC 2011.
 *
 * C99 (with AVX2 intrinsics when the target has AVX2; OpenMP threads when built with -fopenmp, see
 * DEFINE_EXPORTS). Built by native.py with -O3 (-march=native when the compiler takes it) and never
 * with -ffast-math: p - u must round exactly as
 * torch's float subtraction does. Contraction of a multiply into that subtraction (an FMA) cannot
 * change a result here, since every product below is exact (integers below 2^53 times powers of two).
 *
 * Philox blocks are made LANES at a time: with AVX2, by intrinsics (gcc 12 does not vectorise the
 * 32x32 -> 64-bit multiplies well: its code was no faster than scalar); otherwise by portable C. The
 * conversions and comparisons are plain loops over a batch, which gcc auto-vectorises. */

#include <stdint.h>

#define PHILOX_M0 0xD2511F53u
#define PHILOX_M1 0xCD9E8D57u
#define PHILOX_W0 0x9E3779B9u
#define PHILOX_W1 0xBB67AE85u
#define PHILOX_ROUNDS 10

#define LANES 12          /* Philox blocks per batch (8 and 16 measured slower) */
#define WORDS (4 * LANES) /* 32-bit words per batch */

/* The round keys of key words (lo32(key), hi32(key)): with AVX2 each in every 64-bit lane, the form
 * the vector philox_batch reads; otherwise plain words. */
#if defined(__AVX2__)
#include <immintrin.h>
typedef __m256i round_key_t;
#define ROUND_KEY(k) _mm256_set1_epi64x(k)
#else
typedef uint32_t round_key_t;
#define ROUND_KEY(k) (k)
#endif

typedef struct {
    round_key_t key0[PHILOX_ROUNDS], key1[PHILOX_ROUNDS];
} schedule_t;

static inline void key_schedule(uint64_t key, schedule_t *schedule) {
    uint32_t k0 = (uint32_t)key, k1 = (uint32_t)(key >> 32);
    for (int round = 0; round < PHILOX_ROUNDS; round++, k0 += PHILOX_W0, k1 += PHILOX_W1) {
        schedule->key0[round] = ROUND_KEY(k0);
        schedule->key1[round] = ROUND_KEY(k1);
    }
}

/* philox_batch(first, schedule, words): words[4 l + r] = word r of block first + l (mod 2^64) of the
 * stream, for 0 <= l < LANES: Philox of counter words (lo32(first + l), hi32(first + l), 0, 0) under
 * the round keys in schedule (made once per call by key_schedule from key words (lo32(key),
 * hi32(key))). */
#if defined(__AVX2__)
#define GROUPS (LANES / 4) /* independent groups of 4 blocks, to hide the multiplies' latency */

/* One block per 64-bit lane, each counter word in the low half of its lane. The high halves carry
 * garbage that never reaches a result: _mm256_mul_epu32 reads only the low halves, and only the low
 * halves are stored. */
static inline void philox_batch(uint64_t first, const schedule_t *schedule, uint32_t words[WORDS]) {
    __m256i x0[GROUPS], x1[GROUPS], x2[GROUPS], x3[GROUPS];
    const __m256i m0 = _mm256_set1_epi64x(PHILOX_M0), m1 = _mm256_set1_epi64x(PHILOX_M1);
    const __m256i start =
        _mm256_add_epi64(_mm256_set1_epi64x((int64_t)first), _mm256_set_epi64x(3, 2, 1, 0));
    for (int g = 0; g < GROUPS; g++) {
        x0[g] = _mm256_add_epi64(start, _mm256_set1_epi64x(4 * g));
        x1[g] = _mm256_srli_epi64(x0[g], 32);
        x2[g] = _mm256_setzero_si256();
        x3[g] = _mm256_setzero_si256();
    }
    for (int round = 0; round < PHILOX_ROUNDS; round++) {
        for (int g = 0; g < GROUPS; g++) {
            __m256i product0 = _mm256_mul_epu32(x0[g], m0), product1 = _mm256_mul_epu32(x2[g], m1);
            x0[g] = _mm256_xor_si256(_mm256_xor_si256(_mm256_srli_epi64(product1, 32), x1[g]),
                                     schedule->key0[round]);
            x1[g] = product1;
            x2[g] = _mm256_xor_si256(_mm256_xor_si256(_mm256_srli_epi64(product0, 32), x3[g]),
                                     schedule->key1[round]);
            x3[g] = product0;
        }
    }
    for (int g = 0; g < GROUPS; g++) {
        /* 64-bit lane l of pair01 / pair23: words 0-1 / 2-3 of block 4 g + l. */
        __m256i pair01 = _mm256_blend_epi32(x0[g], _mm256_slli_epi64(x1[g], 32), 0xAA);
        __m256i pair23 = _mm256_blend_epi32(x2[g], _mm256_slli_epi64(x3[g], 32), 0xAA);
        __m256i blocks02 = _mm256_unpacklo_epi64(pair01, pair23); /* blocks 0, 2 of the group */
        __m256i blocks13 = _mm256_unpackhi_epi64(pair01, pair23); /* blocks 1, 3 */
        __m256i blocks01 = _mm256_permute2x128_si256(blocks02, blocks13, 0x20);
        __m256i blocks23 = _mm256_permute2x128_si256(blocks02, blocks13, 0x31);
        _mm256_storeu_si256((__m256i *)(words + 16 * g), blocks01);
        _mm256_storeu_si256((__m256i *)(words + 16 * g + 8), blocks23);
    }
}
#else
static inline void philox_batch(uint64_t first, const schedule_t *schedule, uint32_t words[WORDS]) {
    for (int l = 0; l < LANES; l++) {
        uint64_t counter = first + (uint64_t)l;
        uint32_t x0 = (uint32_t)counter, x1 = (uint32_t)(counter >> 32), x2 = 0, x3 = 0;
        for (int round = 0; round < PHILOX_ROUNDS; round++) {
            uint64_t product0 = (uint64_t)PHILOX_M0 * x0;
            uint64_t product1 = (uint64_t)PHILOX_M1 * x2;
            x0 = (uint32_t)(product1 >> 32) ^ x1 ^ schedule->key0[round];
            x1 = (uint32_t)product1;
            x2 = (uint32_t)(product0 >> 32) ^ x3 ^ schedule->key1[round];
            x3 = (uint32_t)product0;
        }
        words[4 * l + 0] = x0;
        words[4 * l + 1] = x1;
        words[4 * l + 2] = x2;
        words[4 * l + 3] = x3;
    }
}
#endif

/* Uniform number t of a batch: float32 from one word (grid 2^-24), float64 from two (grid 2^-53). The
 * shifted words are below 2^31, so the signed conversions (which AVX2 has) are exact. */
#define UNIFORM_F32(w, t) ((float)(int32_t)((w)[t] >> 8) * 0x1p-24f)
#define UNIFORM_F64(w, t)                                                                                   \
    (((double)(int32_t)((w)[2 * (t)] >> 5) * 0x1p26 + (double)(int32_t)((w)[2 * (t) + 1] >> 6)) * 0x1p-53)

/* Walks numbers offset .. offset + n - 1 of the stream batch by batch: STEP handles elements
 * j .. j + take - 1, which are numbers from .. from + take - 1 of the batch in words[]. In a full batch
 * from and take are constants, so that the inlined loops have fixed bounds. */
#define WALK_STREAM(PER_BLOCK, STEP)                                                                        \
    do {                                                                                                    \
        uint32_t words[WORDS];                                                                              \
        schedule_t schedule;                                                                                \
        key_schedule(key, &schedule);                                                                       \
        const int64_t per_batch = (int64_t)(PER_BLOCK) * LANES;                                             \
        uint64_t block = offset / (PER_BLOCK);                                                              \
        int64_t s = (int64_t)(offset % (PER_BLOCK));                                                        \
        for (int64_t j = 0; j < n; block += LANES) {                                                        \
            philox_batch(block, &schedule, words);                                                          \
            int64_t m = per_batch - s < n - j ? per_batch - s : n - j;                                      \
            if (m == per_batch) {                                                                           \
                const int64_t from = 0, take = (PER_BLOCK) * LANES;                                         \
                STEP;                                                                                       \
            } else {                                                                                        \
                const int64_t from = s, take = m;                                                           \
                STEP;                                                                                       \
            }                                                                                               \
            j += m;                                                                                         \
            s = 0;                                                                                          \
        }                                                                                                   \
    } while (0)

/* The kernels of one precision T (PER_BLOCK numbers per Philox block), over one range of the stream:
 *   uniform_range_SUFFIX(out, n, key, offset): out[j] = uniform number offset + j of the stream of key.
 *   bernoulli_range_SUFFIX(p, out, n, key, offset): with u that number and d = p[j] - u, out[j] = 1 if
 *   d >= GRID else 0; returns the number of j with 0 < d < GRID. out may be p. NaN p: out 0, not
 *   counted.
 * The Bernoulli differences go through a local array so that the loop reading p and the loop writing
 * out are separate (out may be p) and both vectorise without alias checks. */
#define DEFINE_KERNELS(SUFFIX, T, PER_BLOCK, UNIFORM, GRID)                                                 \
    static inline void fill_##SUFFIX(T *out, const uint32_t *words, int64_t s, int64_t m) {                 \
        for (int64_t t = 0; t < m; t++) out[t] = UNIFORM(words, s + t);                                     \
    }                                                                                                       \
    static inline int32_t compare_##SUFFIX(const T *p, T *out, const uint32_t *words, int64_t s,            \
                                           int64_t m) {                                                     \
        T difference[(PER_BLOCK) * LANES];                                                                  \
        int32_t in_cell = 0;                                                                                \
        for (int64_t t = 0; t < m; t++) difference[t] = p[t] - UNIFORM(words, s + t);                       \
        for (int64_t t = 0; t < m; t++) {                                                                   \
            out[t] = difference[t] >= (GRID) ? (T)1 : (T)0;                                                 \
            in_cell += (difference[t] > (T)0) & (difference[t] < (GRID));                                   \
        }                                                                                                   \
        return in_cell;                                                                                     \
    }                                                                                                       \
    static void uniform_range_##SUFFIX(T *out, int64_t n, uint64_t key, uint64_t offset) {                  \
        WALK_STREAM(PER_BLOCK, fill_##SUFFIX(out + j, words, from, take));                                  \
    }                                                                                                       \
    static int64_t bernoulli_range_##SUFFIX(const T *p, T *out, int64_t n, uint64_t key, uint64_t offset) { \
        int64_t count = 0;                                                                                  \
        WALK_STREAM(PER_BLOCK, count += compare_##SUFFIX(p + j, out + j, words, from, take));               \
        return count;                                                                                       \
    }

DEFINE_KERNELS(f32, float, 4, UNIFORM_F32, 0x1p-24f)
DEFINE_KERNELS(f64, double, 2, UNIFORM_F64, 0x1p-53)

/* The exported kernels: ebm_uniform_SUFFIX(out, n, key, offset) and ebm_bernoulli_SUFFIX(p, out, n, key,
 * offset) are the range kernels above over chunks of CHUNK numbers. Built with -fopenmp, the chunks of
 * a call of at least two are shared among OpenMP threads. The process's OpenMP runtime is torch's
 * (torch loads its libgomp.so.1 first, and this library's libgomp.so.1 resolves to it), so the chunks
 * run on the threads torch's own kernels use, with torch's thread count: measured here, two threads
 * halve a draw even right after a matrix product, where a thread of our own competed with torch's
 * spinning worker and lost. The stream is counter-based, so results do not depend on the split. */
#define CHUNK 16384

#define DEFINE_EXPORTS(SUFFIX, T)                                                                           \
    void ebm_uniform_##SUFFIX(T *out, int64_t n, uint64_t key, uint64_t offset) {                           \
        const int64_t chunks = (n + CHUNK - 1) / CHUNK;                                                     \
        _Pragma("omp parallel for if (chunks > 1) schedule(static)")                                        \
        for (int64_t c = 0; c < chunks; c++) {                                                              \
            const int64_t start = c * CHUNK, m = n - start < CHUNK ? n - start : CHUNK;                     \
            uniform_range_##SUFFIX(out + start, m, key, offset + (uint64_t)start);                          \
        }                                                                                                   \
    }                                                                                                       \
    int64_t ebm_bernoulli_##SUFFIX(const T *p, T *out, int64_t n, uint64_t key, uint64_t offset) {          \
        const int64_t chunks = (n + CHUNK - 1) / CHUNK;                                                     \
        int64_t count = 0;                                                                                  \
        _Pragma("omp parallel for if (chunks > 1) reduction(+ : count) schedule(static)")                   \
        for (int64_t c = 0; c < chunks; c++) {                                                              \
            const int64_t start = c * CHUNK, m = n - start < CHUNK ? n - start : CHUNK;                     \
            count += bernoulli_range_##SUFFIX(p + start, out + start, m, key, offset + (uint64_t)start);    \
        }                                                                                                   \
        return count;                                                                                       \
    }

DEFINE_EXPORTS(f32, float)
DEFINE_EXPORTS(f64, double)
