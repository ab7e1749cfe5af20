/*
 * Compiled kernel of seedbed's generator (specification: docs/generator.md).
 *
 * Same bytes as the numpy reference, by construction:
 *   - only IEEE-754 basic operations (+ - * /, sqrt) on float64, in the documented order,
 *     each rounded separately: the build turns contraction off (-ffp-contract=off), never
 *     enables fast-math, and x86-64 evaluates in SSE registers (FLT_EVAL_METHOD 0);
 *   - the unit-interval values are built by exact bit manipulation instead of integer to
 *     float conversions (same values; vectorises without AVX-512);
 *   - the logarithm is the documented one, never the C library's.
 * The loops are compiled twice, for baseline x86-64 and for AVX2; both produce the same
 * values (a wider register does the same correctly rounded operation per lane). AVX2 is
 * used when the CPU has it and numpy's NPY_DISABLE_CPU_FEATURES does not name it.
 *
 * Every entry point releases the GIL while it computes, so several threads can fill
 * disjoint blocks of one output at once.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <float.h>
#include <math.h>
#include <stdint.h>
#include <string.h>

#if defined(__GNUC__) && defined(__FAST_MATH__)
#error "the generator kernel must not be built with fast-math: it changes output bytes"
#endif

#if defined(__GNUC__) && (defined(__x86_64__) || defined(__i386__))
#define SEEDBED_X86_DISPATCH 1
#define SEEDBED_INLINE static inline __attribute__((always_inline))
#else
#define SEEDBED_INLINE static inline
#endif

/* Values per chunk: the scratch arrays below stay in the L1/L2 cache. */
#define CHUNK 1024

/* ---------------------------------------------------------------- Philox4x64-10 */

static const uint64_t PHILOX_M0 = 0xD2E7470EE14C6C93ULL;
static const uint64_t PHILOX_M1 = 0xCA5A826395121157ULL;
static const uint64_t PHILOX_W0 = 0x9E3779B97F4A7C15ULL; /* golden ratio */
static const uint64_t PHILOX_W1 = 0xBB67AE8584CAA73BULL; /* sqrt(3) - 1 */

SEEDBED_INLINE uint64_t mul_hi_lo(uint64_t a, uint64_t b, uint64_t *hi)
{
#if defined(__SIZEOF_INT128__)
    unsigned __int128 p = (unsigned __int128)a * b;
    *hi = (uint64_t)(p >> 64);
    return (uint64_t)p;
#else
    /* Schoolbook on 32-bit halves: exact, for compilers without a 128-bit type. */
    uint64_t a_lo = a & 0xFFFFFFFFu, a_hi = a >> 32, b_lo = b & 0xFFFFFFFFu, b_hi = b >> 32;
    uint64_t ll = a_lo * b_lo, lh = a_lo * b_hi, hl = a_hi * b_lo, hh = a_hi * b_hi;
    uint64_t mid = (ll >> 32) + (lh & 0xFFFFFFFFu) + (hl & 0xFFFFFFFFu);
    *hi = hh + (lh >> 32) + (hl >> 32) + (mid >> 32);
    return (mid << 32) | (ll & 0xFFFFFFFFu);
#endif
}

/* The four output words for counter (c0, c1, c2, c3), key (k0, k1) (Salmon et al. 2011). */
SEEDBED_INLINE void philox_block(uint64_t c0, uint64_t c1, uint64_t c2, uint64_t c3,
                                 uint64_t k0, uint64_t k1, uint64_t *out)
{
    for (int round = 0; round < 10; round++) {
        if (round) {
            k0 += PHILOX_W0;
            k1 += PHILOX_W1;
        }
        uint64_t hi0, hi1;
        uint64_t lo0 = mul_hi_lo(PHILOX_M0, c0, &hi0);
        uint64_t lo1 = mul_hi_lo(PHILOX_M1, c2, &hi1);
        uint64_t n0 = hi1 ^ c1 ^ k0;
        uint64_t n2 = hi0 ^ c3 ^ k1;
        c0 = n0;
        c1 = lo1;
        c2 = n2;
        c3 = lo0;
    }
    out[0] = c0;
    out[1] = c1;
    out[2] = c2;
    out[3] = c3;
}

/* Draws for logical indices [start, start + n): buf receives whole blocks, and the draw of
 * index start is buf[start % 4]. buf must hold n + 7 words. */
SEEDBED_INLINE void draws_into(uint64_t k0, uint64_t k1, uint64_t stream, uint64_t start,
                               size_t n, uint64_t *buf)
{
    uint64_t first = start >> 2;
    uint64_t last = (start + n + 3) >> 2;
    for (uint64_t b = first; b < last; b++)
        philox_block(b, stream, 0, 0, k0, k1, buf + 4 * (b - first));
}

/* ---------------------------------------------------------------- bits and constants */

SEEDBED_INLINE double from_bits(uint64_t b)
{
    double d;
    memcpy(&d, &b, sizeof d);
    return d;
}

SEEDBED_INLINE uint64_t to_bits(double d)
{
    uint64_t b;
    memcpy(&b, &d, sizeof b);
    return b;
}

#define ONE_BITS 0x3FF0000000000000ULL
#define TWO_BITS 0x4000000000000000ULL
#define FRACTION_MASK 0x000FFFFFFFFFFFFFULL

static const double CENTRAL_CONST = 0.180625;
static const double SPLIT_CENTRAL = 0.425;
static const double SPLIT_FAR = 5.0;
static const double MIDDLE_SHIFT = 1.6;

/* Wichura (1988), AS 241 (PPND16), lowest degree first. */
static const double AS241_A[8] = {
    3.3871328727963666080e0, 1.3314166789178437745e2, 1.9715909503065514427e3,
    1.3731693765509461125e4, 4.5921953931549871457e4, 6.7265770927008700853e4,
    3.3430575583588128105e4, 2.5090809287301226727e3};
static const double AS241_B[8] = {
    1.0, 4.2313330701600911252e1, 6.8718700749205790830e2, 5.3941960214247511077e3,
    2.1213794301586595867e4, 3.9307895800092710610e4, 2.8729085735721942674e4,
    5.2264952788528545610e3};
static const double AS241_C[8] = {
    1.42343711074968357734e0, 4.63033784615654529590e0, 5.76949722146069140550e0,
    3.64784832476320460504e0, 1.27045825245236838258e0, 2.41780725177450611770e-1,
    2.27238449892691845833e-2, 7.74545014278341407640e-4};
static const double AS241_D[8] = {
    1.0, 2.05319162663775882187e0, 1.67638483018380384940e0, 6.89767334985100004550e-1,
    1.48103976427480074590e-1, 1.51986665636164571966e-2, 5.47593808499534494600e-4,
    1.05075007164441684324e-9};
static const double AS241_E[8] = {
    6.65790464350110377720e0, 5.46378491116411436990e0, 1.78482653991729133580e0,
    2.96560571828504891230e-1, 2.65321895265761230930e-2, 1.24266094738807843860e-3,
    2.71155556874348757815e-5, 2.01033439929228813265e-7};
static const double AS241_F[8] = {
    1.0, 5.99832206555887937690e-1, 1.36929880922735805310e-1, 1.48753612908506148525e-2,
    7.86869131145613259100e-4, 1.84631831751005468180e-5, 1.42151175831644588870e-7,
    2.04426310338993978564e-15};

/* The logarithm's constants come from Python (the same doubles as the reference module)
 * through init(); zero until then, and every entry point refuses to run before it. */
static double LOG_SERIES[11];
static double LN2_HI, LN2_LO, TRUNC_MASS, TRUNC_BOUND;
static int constants_ready = 0;

/* Horner from the top: h = p7*r; h += p6; h *= r; h += p5; ...; h *= r; h += p0. */
SEEDBED_INLINE double horner8(const double *p, double r)
{
    double h = p[7] * r;
    h = h + p[6];
    for (int k = 5; k >= 0; k--) {
        h = h * r;
        h = h + p[k];
    }
    return h;
}

/* v = 2u - 1 = ((x >> 11) - 2**52) * 2**-52. With b the top bit of x and L the next 52:
 * v = (1 + L * 2**-52) - (2 - b), and the subtraction is exact (the result is a multiple of
 * 2**-52 no larger than 1 in magnitude). */
SEEDBED_INLINE double symmetric_uniform(uint64_t x)
{
    double mantissa = from_bits(ONE_BITS | ((x >> 11) & FRACTION_MASK));
    double offset = from_bits(TWO_BITS - ((x >> 63) << 52));
    return mantissa - offset;
}

/* q = p - 1/2 = (((x >> 11) | 1) - 2**52) * 2**-53: the same construction, halved (exact). */
SEEDBED_INLINE double centered_probability(uint64_t x)
{
    double mantissa = from_bits(ONE_BITS | (((x >> 11) | 1u) & FRACTION_MASK));
    double offset = from_bits(TWO_BITS - ((x >> 63) << 52));
    return (mantissa - offset) * 0.5;
}

/* docs/generator.md section 4.4, for positive normal x (the generator only takes the log of
 * r = min(p, 1 - p) >= 2**-53; the reference's subnormal scaling adds 0 to e for these, so
 * leaving it out changes nothing and keeps the loop free of branches). */
SEEDBED_INLINE double deterministic_log(double x)
{
    int64_t ix = (int64_t)to_bits(x);
    int64_t d = (int64_t)((uint64_t)(ix - 0x3FE6A09E667F3BCDLL) & 0xFFF0000000000000ULL);
    double m = from_bits((uint64_t)(ix - d));
    /* e = d >> 52 (arithmetic); its top 32 bits are e * 2**20, converted exactly. */
    double e = (double)(int32_t)(d >> 32) * 0x1p-20;
    double f = m - 1.0;
    double s = f + 2.0;
    s = f / s;
    double w = s * s;
    double t = w * LOG_SERIES[10];
    t = t + LOG_SERIES[9];
    for (int k = 8; k >= 0; k--) {
        t = t * w;
        t = t + LOG_SERIES[k];
    }
    t = t * w;
    t = f - t;
    t = t * s;
    double lo = e * LN2_LO;
    t = t - lo;
    t = f - t;
    double hi = e * LN2_HI;
    return hi + t;
}

/* ---------------------------------------------------------------- chunk transforms */

/* Uniform values of one chunk. */
SEEDBED_INLINE void uniform_chunk(const uint64_t *x, double *z, size_t n)
{
    for (size_t i = 0; i < n; i++)
        z[i] = symmetric_uniform(x[i]);
}

/* Normal (mass 1, no clamp) or truncated normal values of one chunk, in two passes: the
 * central formula for every element (branch-free, vectorised), then the tails (about 15 %)
 * gathered into a compact array, recomputed, and scattered back. */
SEEDBED_INLINE void normal_chunk(const uint64_t *x, double *z, size_t n, int truncated,
                                 double *q, double *tail_q, double *tail_z, uint32_t *tail_at)
{
    if (truncated) {
        for (size_t i = 0; i < n; i++)
            q[i] = centered_probability(x[i]) * TRUNC_MASS;
    } else {
        for (size_t i = 0; i < n; i++)
            q[i] = centered_probability(x[i]);
    }
    for (size_t i = 0; i < n; i++) {
        double qi = q[i];
        double r = qi * qi;
        r = CENTRAL_CONST - r;
        double top = horner8(AS241_A, r);
        top = qi * top;
        double bottom = horner8(AS241_B, r);
        z[i] = top / bottom;
    }
    size_t tails = 0;
    for (size_t i = 0; i < n; i++) {
        if (fabs(q[i]) > SPLIT_CENTRAL) {
            tail_q[tails] = q[i];
            tail_at[tails] = (uint32_t)i;
            tails++;
        }
    }
    for (size_t j = 0; j < tails; j++) {
        double r = 0.5 - fabs(tail_q[j]); /* = min(p, 1 - p), exact */
        double s = -deterministic_log(r);
        s = sqrt(s);
        tail_z[j] = s; /* kept for the far-tail check below */
    }
    for (size_t j = 0; j < tails; j++) {
        double t = tail_z[j] - MIDDLE_SHIFT;
        double top = horner8(AS241_C, t);
        double bottom = horner8(AS241_D, t);
        tail_q[j] = copysign(top / bottom, tail_q[j]);
    }
    for (size_t j = 0; j < tails; j++) {
        double s = tail_z[j];
        if (s > SPLIT_FAR) { /* r below about 1.4e-11: rare, so out of the vector loop */
            double t = s - SPLIT_FAR;
            double top = horner8(AS241_E, t);
            double bottom = horner8(AS241_F, t);
            tail_q[j] = copysign(top / bottom, tail_q[j]);
        }
        z[tail_at[j]] = tail_q[j];
    }
    if (truncated) {
        double bound = TRUNC_BOUND;
        for (size_t i = 0; i < n; i++) {
            double v = z[i];
            v = v < bound ? v : bound;
            v = v > -bound ? v : -bound;
            z[i] = v;
        }
    }
}

enum { DIST_UNIFORM = 0, DIST_NORMAL = 1, DIST_TRUNCATED = 2 };
enum { OUT_FLOAT64 = 0, OUT_FLOAT32 = 1 };

/* Fill out[0 .. count) with the values of logical indices [start, start + count), each
 * multiplied by `scale` (one IEEE product; 1.0 leaves a value unchanged) and, for float32,
 * converted once (round to nearest even). Returns 1 if a float32 result overflowed. */
SEEDBED_INLINE int fill_body(int dist, uint64_t k0, uint64_t k1, uint64_t stream, uint64_t start,
                             size_t count, double scale, int out_kind, void *out)
{
    uint64_t raw[CHUNK + 8];
    double z[CHUNK], q[CHUNK], tail_q[CHUNK], tail_z[CHUNK];
    uint32_t tail_at[CHUNK];
    int overflow = 0;
    for (size_t done = 0; done < count;) {
        size_t n = count - done < CHUNK ? count - done : CHUNK;
        uint64_t first = start + done;
        draws_into(k0, k1, stream, first, n, raw);
        const uint64_t *x = raw + (first & 3u);
        if (dist == DIST_UNIFORM)
            uniform_chunk(x, z, n);
        else
            normal_chunk(x, z, n, dist == DIST_TRUNCATED, q, tail_q, tail_z, tail_at);
        if (out_kind == OUT_FLOAT64) {
            double *dst = (double *)out + done;
            for (size_t i = 0; i < n; i++)
                dst[i] = z[i] * scale;
        } else {
            float *dst = (float *)out + done;
            int bad = 0;
            for (size_t i = 0; i < n; i++) {
                double v = z[i] * scale;
                float f = (float)v;
                dst[i] = f;
                bad |= !(fabsf(f) <= FLT_MAX); /* inf or nan, as the reference checks */
            }
            overflow |= bad;
        }
        done += n;
    }
    return overflow;
}

SEEDBED_INLINE void raw_body(uint64_t k0, uint64_t k1, uint64_t stream, uint64_t start,
                             size_t count, uint64_t *out)
{
    uint64_t raw[CHUNK + 8];
    for (size_t done = 0; done < count;) {
        size_t n = count - done < CHUNK ? count - done : CHUNK;
        uint64_t first = start + done;
        draws_into(k0, k1, stream, first, n, raw);
        memcpy(out + done, raw + (first & 3u), n * sizeof(uint64_t));
        done += n;
    }
}

static int fill_baseline(int dist, uint64_t k0, uint64_t k1, uint64_t stream, uint64_t start,
                         size_t count, double scale, int out_kind, void *out)
{
    return fill_body(dist, k0, k1, stream, start, count, scale, out_kind, out);
}

#ifdef SEEDBED_X86_DISPATCH
__attribute__((target("avx2"))) static int fill_avx2(int dist, uint64_t k0, uint64_t k1,
                                                      uint64_t stream, uint64_t start,
                                                      size_t count, double scale, int out_kind,
                                                      void *out)
{
    return fill_body(dist, k0, k1, stream, start, count, scale, out_kind, out);
}
#endif

typedef int (*fill_fn)(int, uint64_t, uint64_t, uint64_t, uint64_t, size_t, double, int, void *);
static fill_fn fill_impl = fill_baseline;
static const char *fill_target = "baseline";

/* ---------------------------------------------------------------- Python interface */

static int unsigned_word(PyObject *obj, const char *what, uint64_t *value)
{
    unsigned long long v = PyLong_AsUnsignedLongLong(obj);
    if (v == (unsigned long long)-1 && PyErr_Occurred()) {
        PyErr_Format(PyExc_ValueError, "%s must be an integer in 0..2**64-1", what);
        return -1;
    }
    *value = (uint64_t)v;
    return 0;
}

/* A writable C-contiguous buffer of `itemsize`-byte items; returns its item count or -1. */
static Py_ssize_t writable_items(PyObject *obj, Py_buffer *view, Py_ssize_t itemsize)
{
    if (PyObject_GetBuffer(obj, view, PyBUF_WRITABLE | PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0)
        return -1;
    if (view->itemsize != itemsize || view->len % itemsize != 0) {
        PyBuffer_Release(view);
        PyErr_Format(PyExc_ValueError, "out must hold %zd-byte items", itemsize);
        return -1;
    }
    return view->len / itemsize;
}

static int check_range(uint64_t start, Py_ssize_t count)
{
    if (!constants_ready) {
        PyErr_SetString(PyExc_RuntimeError, "generator kernel used before init()");
        return -1;
    }
    if (start >= ((uint64_t)1 << 63) || (uint64_t)count > ((uint64_t)1 << 63) - start) {
        PyErr_SetString(PyExc_ValueError, "start + count must be <= 2**63");
        return -1;
    }
    return 0;
}

PyDoc_STRVAR(raw_doc, "raw(k0, k1, stream, start, out): uint64 draws of [start, start + len(out)).");

static PyObject *kernel_raw(PyObject *self, PyObject *args)
{
    PyObject *k0o, *k1o, *streamo, *starto, *outo;
    uint64_t k0, k1, stream, start;
    Py_buffer view;
    if (!PyArg_ParseTuple(args, "OOOOO:raw", &k0o, &k1o, &streamo, &starto, &outo))
        return NULL;
    if (unsigned_word(k0o, "k0", &k0) || unsigned_word(k1o, "k1", &k1) ||
        unsigned_word(streamo, "stream", &stream) || unsigned_word(starto, "start", &start))
        return NULL;
    Py_ssize_t count = writable_items(outo, &view, 8);
    if (count < 0)
        return NULL;
    if (check_range(start, count) < 0) {
        PyBuffer_Release(&view);
        return NULL;
    }
    Py_BEGIN_ALLOW_THREADS
    raw_body(k0, k1, stream, start, (size_t)count, (uint64_t *)view.buf);
    Py_END_ALLOW_THREADS
    PyBuffer_Release(&view);
    Py_RETURN_NONE;
}

PyDoc_STRVAR(fill_doc,
             "fill(dist, k0, k1, stream, start, scale, out) -> overflowed\n\n"
             "dist: 0 uniform, 1 normal, 2 truncated normal. out: float64 or float32 buffer;\n"
             "out[j] = round(standard value of index start + j times scale). Returns True when a\n"
             "float32 result is beyond the largest finite float32.");

static PyObject *kernel_fill(PyObject *self, PyObject *args)
{
    int dist;
    double scale;
    PyObject *k0o, *k1o, *streamo, *starto, *outo;
    uint64_t k0, k1, stream, start;
    Py_buffer view;
    if (!PyArg_ParseTuple(args, "iOOOOdO:fill", &dist, &k0o, &k1o, &streamo, &starto, &scale,
                          &outo))
        return NULL;
    if (dist < DIST_UNIFORM || dist > DIST_TRUNCATED) {
        PyErr_SetString(PyExc_ValueError, "dist must be 0 (uniform), 1 (normal) or 2 (truncated)");
        return NULL;
    }
    if (unsigned_word(k0o, "k0", &k0) || unsigned_word(k1o, "k1", &k1) ||
        unsigned_word(streamo, "stream", &stream) || unsigned_word(starto, "start", &start))
        return NULL;
    if (PyObject_GetBuffer(outo, &view, PyBUF_WRITABLE | PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0)
        return NULL;
    int out_kind;
    const char *fmt = view.format ? view.format : "B";
    if (*fmt == '<' || *fmt == '=' || *fmt == '@')
        fmt++;
    if (view.itemsize == 8 && strcmp(fmt, "d") == 0)
        out_kind = OUT_FLOAT64;
    else if (view.itemsize == 4 && strcmp(fmt, "f") == 0)
        out_kind = OUT_FLOAT32;
    else {
        PyBuffer_Release(&view);
        PyErr_SetString(PyExc_ValueError, "out must be a native float64 or float32 buffer");
        return NULL;
    }
    Py_ssize_t count = view.len / view.itemsize;
    if (check_range(start, count) < 0) {
        PyBuffer_Release(&view);
        return NULL;
    }
    int overflow;
    fill_fn impl = fill_impl;
    Py_BEGIN_ALLOW_THREADS
    overflow = impl(dist, k0, k1, stream, start, (size_t)count, scale, out_kind, view.buf);
    Py_END_ALLOW_THREADS
    PyBuffer_Release(&view);
    return PyBool_FromLong(overflow);
}

PyDoc_STRVAR(init_doc,
             "init(series, ln2_hi, ln2_lo, mass, bound, use_wide): set the logarithm's series\n"
             "(11 doubles), the truncation constants and whether AVX2 loops may be used;\n"
             "returns the name of the loops in use ('avx2' or 'baseline').");

static PyObject *kernel_init(PyObject *self, PyObject *args)
{
    PyObject *series;
    double ln2_hi, ln2_lo, mass, bound;
    int use_wide;
    if (!PyArg_ParseTuple(args, "Oddddp:init", &series, &ln2_hi, &ln2_lo, &mass, &bound,
                          &use_wide))
        return NULL;
    PyObject *seq = PySequence_Fast(series, "series must be a sequence of 11 floats");
    if (seq == NULL)
        return NULL;
    if (PySequence_Fast_GET_SIZE(seq) != 11) {
        Py_DECREF(seq);
        PyErr_SetString(PyExc_ValueError, "series must hold 11 floats");
        return NULL;
    }
    double values[11];
    for (int k = 0; k < 11; k++) {
        values[k] = PyFloat_AsDouble(PySequence_Fast_GET_ITEM(seq, k));
        if (values[k] == -1.0 && PyErr_Occurred()) {
            Py_DECREF(seq);
            return NULL;
        }
    }
    Py_DECREF(seq);
    memcpy(LOG_SERIES, values, sizeof values);
    LN2_HI = ln2_hi;
    LN2_LO = ln2_lo;
    TRUNC_MASS = mass;
    TRUNC_BOUND = bound;
    fill_impl = fill_baseline;
    fill_target = "baseline";
#ifdef SEEDBED_X86_DISPATCH
    __builtin_cpu_init();
    if (use_wide && __builtin_cpu_supports("avx2")) {
        fill_impl = fill_avx2;
        fill_target = "avx2";
    }
#endif
    constants_ready = 1;
    return PyUnicode_FromString(fill_target);
}

static PyMethodDef kernel_methods[] = {
    {"init", kernel_init, METH_VARARGS, init_doc},
    {"raw", kernel_raw, METH_VARARGS, raw_doc},
    {"fill", kernel_fill, METH_VARARGS, fill_doc},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef kernel_module = {
    PyModuleDef_HEAD_INIT, "_kernel",
    "Compiled kernel of seedbed's generator (same bytes as the numpy reference).", -1,
    kernel_methods,
};

PyMODINIT_FUNC PyInit__kernel(void)
{
    return PyModule_Create(&kernel_module);
}
