/*
 * Fused row passes of the sketch core (sketchmerge/summary.py).
 *
 * Each function here does in one pass over the rows what the pure numpy
 * code in summary.py does in several, with the same integer arithmetic and
 * the same summation order, so a summary built with these kernels is
 * bit-for-bit the summary built without them (tests/test_kernels.py checks
 * this on many inputs).  The kernels are optional: summary.py falls back to
 * numpy when this extension is not built or SKETCHMERGE_KERNELS=0.
 *
 * Arrays come in through the buffer protocol (no numpy headers needed to
 * build), must be C-contiguous with 8-byte items (1-byte for flags), and
 * every loop runs without the GIL, so worker threads sketch in parallel.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <stdint.h>
#include <string.h>
#if defined(__SSE2__)
#include <emmintrin.h>
#endif

#if defined(__BYTE_ORDER__) && __BYTE_ORDER__ == __ORDER_BIG_ENDIAN__
#error "the kernels read little-endian words; the numpy paths serve big-endian hosts"
#endif

static int
get_buf(PyObject *obj, Py_buffer *view, Py_ssize_t itemsize, int writable, const char *name)
{
    int flags = PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0);
    if (PyObject_GetBuffer(obj, view, flags) < 0)
        return -1;
    if (view->itemsize != itemsize || view->ndim > 1) {
        PyErr_Format(PyExc_ValueError, "%s: expected a 1-D array of %zd-byte items", name, itemsize);
        PyBuffer_Release(view);
        return -1;
    }
    return 0;
}

static int read_stream(const uint8_t *d, Py_ssize_t len, Py_ssize_t m, Py_ssize_t block, uint64_t *out);

static inline uint64_t
float_key(double v)
{
    /* order-preserving image of the float64 bits; -0.0 and +0.0 share a key
       (summary.float_keys, same arithmetic) */
    int64_t i;
    memcpy(&i, &v, 8);
    int64_t s = i >> 63;
    int64_t m = i & INT64_MAX;
    uint64_t k = (uint64_t)((m ^ s) - s);
    return k ^ (UINT64_C(1) << 63);
}

/* The order of the non-NaN values: 1 non-decreasing, -1 non-increasing, 0 neither
   (the scalar loop; scan uses it when there are NaNs to skip). */
static int
order_skipping_nan(const double *x, Py_ssize_t n)
{
    Py_ssize_t i = 0;
    int asc = 1, desc = 1;
    while (i < n && isnan(x[i]))
        i++;
    if (i >= n)
        return 1;
    double prev = x[i];
    for (i++; i < n; i++) {
        double v = x[i];
        if (isnan(v))
            continue;
        asc &= v >= prev;
        desc &= v <= prev;
        if (!(asc | desc))
            return 0;  /* neither: the rest cannot change that */
        prev = v;
    }
    return asc ? 1 : (desc ? -1 : 0);
}

/* scan(x) -> (nan_count, vmin, vmax, order): order is 1 when the non-NaN
   values are non-decreasing, -1 when non-increasing (and not constant), else 0.

   One branch-free pass (SSE2 on x86-64, four values a step): NaN count, extremes
   (a NaN never replaces one: MINPD keeps its second operand when either is NaN),
   and whether each value is >= / <= its predecessor.  Those adjacent tests are the
   order when there is no NaN; with NaNs the order of the values between them comes
   from the scalar loop.  -0.0 and +0.0 share a key downstream, so which zero an
   extreme reports does not matter. */
static PyObject *
k_scan(PyObject *self, PyObject *args)
{
    PyObject *xo;
    if (!PyArg_ParseTuple(args, "O", &xo))
        return NULL;
    Py_buffer xb;
    if (get_buf(xo, &xb, 8, 0, "x") < 0)
        return NULL;
    const double *x = (const double *)xb.buf;
    Py_ssize_t n = xb.len / 8, nan = 0;
    double vmin = NAN, vmax = NAN;
    int order = 1;
    Py_BEGIN_ALLOW_THREADS
    if (n > 0) {
        double lo = INFINITY, hi = -INFINITY;
        int up = 1, down = 1;   /* every adjacent pair (NaN pairs fail both) */
        Py_ssize_t i = 1;
        nan = isnan(x[0]) != 0;
        if (!nan)
            lo = hi = x[0];
#if defined(__SSE2__)
        {
            __m128d mn0 = _mm_set1_pd(lo), mn1 = mn0, mx0 = _mm_set1_pd(hi), mx1 = mx0;
            __m128i cnt0 = _mm_setzero_si128(), cnt1 = cnt0;
            __m128d fu = _mm_setzero_pd(), fd = fu;
            for (; i + 4 <= n; i += 4) {
                __m128d c0 = _mm_loadu_pd(x + i), c1 = _mm_loadu_pd(x + i + 2);
                __m128d p0 = _mm_loadu_pd(x + i - 1), p1 = _mm_loadu_pd(x + i + 1);
                cnt0 = _mm_sub_epi64(cnt0, _mm_castpd_si128(_mm_cmpunord_pd(c0, c0)));
                cnt1 = _mm_sub_epi64(cnt1, _mm_castpd_si128(_mm_cmpunord_pd(c1, c1)));
                mn0 = _mm_min_pd(c0, mn0);
                mn1 = _mm_min_pd(c1, mn1);
                mx0 = _mm_max_pd(c0, mx0);
                mx1 = _mm_max_pd(c1, mx1);
                fu = _mm_or_pd(fu, _mm_or_pd(_mm_cmpnge_pd(c0, p0), _mm_cmpnge_pd(c1, p1)));
                fd = _mm_or_pd(fd, _mm_or_pd(_mm_cmpnle_pd(c0, p0), _mm_cmpnle_pd(c1, p1)));
            }
            int64_t c[4];
            double a[4], b[4];
            _mm_storeu_si128((__m128i *)c, cnt0);
            _mm_storeu_si128((__m128i *)(c + 2), cnt1);
            _mm_storeu_pd(a, mn0);
            _mm_storeu_pd(a + 2, mn1);
            _mm_storeu_pd(b, mx0);
            _mm_storeu_pd(b + 2, mx1);
            for (int j = 0; j < 4; j++) {
                nan += c[j];
                lo = a[j] < lo ? a[j] : lo;
                hi = b[j] > hi ? b[j] : hi;
            }
            up = _mm_movemask_pd(fu) == 0;
            down = _mm_movemask_pd(fd) == 0;
        }
#endif
        for (; i < n; i++) {
            double v = x[i];
            nan += isnan(v) != 0;
            lo = v < lo ? v : lo;
            hi = v > hi ? v : hi;
            up &= v >= x[i - 1];
            down &= v <= x[i - 1];
        }
        if (nan < n) {
            vmin = lo;
            vmax = hi;
        }
        if (nan == 0)
            order = up ? 1 : (down ? -1 : 0);
        else
            order = order_skipping_nan(x, n);
    }
    Py_END_ALLOW_THREADS
    PyBuffer_Release(&xb);
    return Py_BuildValue("nddi", nan, vmin, vmax, order);
}

/* The first-level map of summary._first_cells: a row's cell from its key.
   Per binade e (from emin, clipped to the map's range as np.take(...,
   mode="clip") does) ncell[e] cells from base[e], linear in the top 16
   mantissa bits; a point mass hv in cell hc splits that cell in three (rows
   below it stay in hc, the value gets hc + 1, rows above it hc + 2, every
   later cell moves up by 2). */
typedef struct {
    int64_t emin;
    const int64_t *ncell, *base;
    Py_ssize_t ne;
    int has_heavy;
    double hv;
    int64_t hc;
} cmap_t;

static inline int64_t
map_cell(const cmap_t *mp, double v)
{
    uint64_t k = float_key(v);
    int64_t e = (int64_t)(k >> 52) - mp->emin;
    e = e < 0 ? 0 : (e >= mp->ne ? mp->ne - 1 : e);
    int64_t c = (int64_t)((k >> 36) & 0xFFFF);
    c = ((c * mp->ncell[e]) >> 16) + mp->base[e];
    if (mp->has_heavy)
        c += c > mp->hc ? 2 : (c == mp->hc ? (v >= mp->hv) + (v > mp->hv) : 0);
    return c;
}

/* Parse (emin, ncell, base, heavy) into mp; ncb and bb receive the buffers
   (released by the caller when this returns 0). */
static int
get_map(long long emin, PyObject *nco, PyObject *bo, PyObject *ho, cmap_t *mp, Py_buffer *ncb,
        Py_buffer *bb)
{
    mp->has_heavy = ho != Py_None;
    mp->hv = 0.0;
    long long hc = -1;
    if (mp->has_heavy && !PyArg_ParseTuple(ho, "dL", &mp->hv, &hc)) {
        PyErr_SetString(PyExc_TypeError, "heavy must be None or (value, cell)");
        return -1;
    }
    mp->hc = hc;
    if (get_buf(nco, ncb, 8, 0, "ncell") < 0)
        return -1;
    if (get_buf(bo, bb, 8, 0, "base") < 0) {
        PyBuffer_Release(ncb);
        return -1;
    }
    mp->ne = ncb->len / 8;
    if (bb->len != ncb->len || mp->ne < 1) {
        PyErr_SetString(PyExc_ValueError, "map: ncell and base lengths do not agree");
        PyBuffer_Release(bb);
        PyBuffer_Release(ncb);
        return -1;
    }
    mp->emin = emin;
    mp->ncell = (const int64_t *)ncb->buf;
    mp->base = (const int64_t *)bb->buf;
    return 0;
}

/* first_level(x, w, emin, ncell, base, heavy, cells, table[, wide])

   The first-level map of summary._first_level and its histograms in one pass.
   cells (int64 or int32) receives each row's cell, or is None.  When wide
   (the default) the table holds 4 words per cell c: the row count (int64),
   the weight (float64, added in row order, as np.bincount does; 0 when w is
   None), and the smallest and largest key (uint64); one cell's words share a
   cache line.  Otherwise it holds one word per cell: the weight, or the row
   count when w is None (a table a quarter the size stays in cache).  The
   table is initialised here. */
static PyObject *
k_first_level(PyObject *self, PyObject *args)
{
    PyObject *xo, *wo, *nco, *bo, *ho, *co, *to;
    long long emin;
    int wide = 1;
    if (!PyArg_ParseTuple(args, "OOLOOOOO|p", &xo, &wo, &emin, &nco, &bo, &ho, &co, &to, &wide))
        return NULL;
    int weighted = wo != Py_None, with_cells = co != Py_None;
    Py_buffer xb, wb, ncb, bb, cb, tb;
    cmap_t mp;
    int got = 0;
    PyObject *res = NULL;
    if (get_buf(xo, &xb, 8, 0, "x") < 0)
        goto done;
    got = 1;
    if (weighted && get_buf(wo, &wb, 8, 0, "w") < 0)
        goto done;
    got = 2;
    if (get_map(emin, nco, bo, ho, &mp, &ncb, &bb) < 0)
        goto done;
    got = 4;
    if (with_cells) {
        if (PyObject_GetBuffer(co, &cb, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | PyBUF_WRITABLE) < 0)
            goto done;
        if ((cb.itemsize != 4 && cb.itemsize != 8) || cb.ndim > 1) {
            PyErr_SetString(PyExc_ValueError, "cells: expected a 1-D array of 4- or 8-byte items");
            PyBuffer_Release(&cb);
            goto done;
        }
    }
    got = 5;
    if (get_buf(to, &tb, 8, 1, "table") < 0)
        goto done;
    got = 6;
    {
        Py_ssize_t n = xb.len / 8, words = wide ? 4 : 1, m = tb.len / (8 * words);
        if ((weighted && wb.len != xb.len) || (with_cells && cb.len / cb.itemsize != n) ||
            tb.len % (8 * words) != 0) {
            PyErr_SetString(PyExc_ValueError, "first_level: array lengths do not agree");
            goto done;
        }
        const double *x = (const double *)xb.buf;
        const double *w = weighted ? (const double *)wb.buf : NULL;
        int64_t *cells = with_cells && cb.itemsize == 8 ? (int64_t *)cb.buf : NULL;
        int32_t *cells32 = with_cells && cb.itemsize == 4 ? (int32_t *)cb.buf : NULL;
        if (cells32 && m > INT32_MAX) {
            PyErr_SetString(PyExc_ValueError, "first_level: too many cells for int32 cells");
            goto done;
        }
        uint64_t *t = (uint64_t *)tb.buf;
        int bad = 0;
        Py_BEGIN_ALLOW_THREADS
        for (Py_ssize_t c = 0; c < m; c++) {
            uint64_t *p = t + c * words;
            p[0] = 0;  /* 0 and the bits of +0.0 */
            if (wide) {
                p[1] = 0;
                p[2] = UINT64_MAX;
                p[3] = 0;
            }
        }
        /* four variants, so the inner loops carry no per-row tests of the options */
#define FIRST_LOOP(WIDE, WEIGHTED)                                              \
        for (Py_ssize_t i = 0; i < n; i++) {                                    \
            double v = x[i];                                                    \
            int64_t c = map_cell(&mp, v);                                       \
            if ((uint64_t)c >= (uint64_t)m) {                                   \
                bad = 1;                                                        \
                break;                                                          \
            }                                                                   \
            if (cells32)                                                        \
                cells32[i] = (int32_t)c;                                        \
            else if (cells)                                                     \
                cells[i] = c;                                                   \
            uint64_t *p = t + c * (WIDE ? 4 : 1);                               \
            if (WIDE)                                                           \
                p[0] += 1;                                                      \
            if (WEIGHTED) {                                                     \
                double s;                                                       \
                memcpy(&s, p + WIDE, 8);                                        \
                s += w[i];                                                      \
                memcpy(p + WIDE, &s, 8);                                        \
            } else if (!WIDE) {                                                 \
                p[0] += 1;                                                      \
            }                                                                   \
            if (WIDE) {                                                         \
                uint64_t k = float_key(v);                                      \
                p[2] = k < p[2] ? k : p[2];                                     \
                p[3] = k > p[3] ? k : p[3];                                     \
            }                                                                   \
        }
        if (wide && weighted) {
            FIRST_LOOP(1, 1)
        } else if (wide) {
            FIRST_LOOP(1, 0)
        } else if (weighted) {
            FIRST_LOOP(0, 1)
        } else {
            FIRST_LOOP(0, 0)
        }
#undef FIRST_LOOP
        Py_END_ALLOW_THREADS
        if (bad) {
            PyErr_SetString(PyExc_ValueError, "first_level: a cell falls outside the histogram");
            goto done;
        }
        res = Py_None;
        Py_INCREF(res);
    }
done:
    if (got >= 6) PyBuffer_Release(&tb);
    if (got >= 5 && with_cells) PyBuffer_Release(&cb);
    if (got >= 4) {
        PyBuffer_Release(&bb);
        PyBuffer_Release(&ncb);
    }
    if (got >= 2 && weighted) PyBuffer_Release(&wb);
    if (got >= 1) PyBuffer_Release(&xb);
    return res;
}

/* cell_ranks(h, cnt, d, ex, pos) -> occupied

   The first level's rank arithmetic of summary._direct in one pass over the
   cells.  Exactly one of h (float64 weight per cell) and cnt (int64 count per
   cell, unweighted data) is given.  ex receives each cell's exclusive
   cumulative weight (sequential sums, as np.cumsum adds; integer sums for
   counts) and pos, for each target rank of the non-decreasing d, the cell
   summary._locate picks: the first cell whose cumulative weight ex + h
   reaches it (the last cell when none does), moved to the nearest cell of
   positive weight before it (or else after it) when it has none.  Returns the
   number of cells of positive weight (or count). */
static PyObject *
k_cell_ranks(PyObject *self, PyObject *args)
{
    PyObject *ho, *co, *dobj, *exo, *po;
    if (!PyArg_ParseTuple(args, "OOOOO", &ho, &co, &dobj, &exo, &po))
        return NULL;
    if ((ho == Py_None) == (co == Py_None)) {
        PyErr_SetString(PyExc_TypeError, "cell_ranks: give exactly one of h and cnt");
        return NULL;
    }
    int weighted = ho != Py_None;
    Py_buffer hb, db, eb, pb;
    if (get_buf(weighted ? ho : co, &hb, 8, 0, weighted ? "h" : "cnt") < 0)
        return NULL;
    if (get_buf(dobj, &db, 8, 0, "d") < 0) {
        PyBuffer_Release(&hb);
        return NULL;
    }
    if (get_buf(exo, &eb, 8, 1, "ex") < 0) {
        PyBuffer_Release(&db);
        PyBuffer_Release(&hb);
        return NULL;
    }
    if (get_buf(po, &pb, 8, 1, "pos") < 0) {
        PyBuffer_Release(&eb);
        PyBuffer_Release(&db);
        PyBuffer_Release(&hb);
        return NULL;
    }
    Py_ssize_t m = hb.len / 8, nd = db.len / 8, occupied = 0;
    int bad = eb.len != hb.len || pb.len != db.len || m < 1;
    if (!bad) {
        const double *h = weighted ? (const double *)hb.buf : NULL;
        const int64_t *cnt = weighted ? NULL : (const int64_t *)hb.buf;
        const double *d = (const double *)db.buf;
        double *ex = (double *)eb.buf;
        int64_t *pos = (int64_t *)pb.buf;
        Py_BEGIN_ALLOW_THREADS
        Py_ssize_t t = 0;
        double acc = 0.0;
        int64_t iacc = 0;
        for (Py_ssize_t c = 0; c < m; c++) {
            double hc, ce;
            if (weighted) {
                hc = h[c];
                ex[c] = acc;
                ce = acc + hc;
                acc = ce;  /* the same addition np.cumsum makes */
            } else {
                hc = (double)cnt[c];
                ex[c] = (double)iacc;
                ce = (double)iacc + hc;
                iacc += cnt[c];
            }
            occupied += weighted ? hc != 0.0 : cnt[c] != 0;
            while (t < nd && ce >= d[t])
                pos[t++] = c;
        }
        for (; t < nd; t++)
            pos[t] = m - 1;
        for (t = 0; t < nd; t++) {
            Py_ssize_t c = pos[t];
            double hc = weighted ? h[c] : (double)cnt[c];
            if (hc > 0.0)
                continue;
            Py_ssize_t q = c;  /* float noise at the end: the nearest weighted cell */
            while (q >= 0 && !((weighted ? h[q] : (double)cnt[q]) > 0.0))
                q--;
            if (q < 0) {
                q = c;
                while (q < m - 1 && !((weighted ? h[q] : (double)cnt[q]) > 0.0))
                    q++;
            }
            pos[t] = q;
        }
        Py_END_ALLOW_THREADS
    }
    PyBuffer_Release(&pb);
    PyBuffer_Release(&eb);
    PyBuffer_Release(&db);
    PyBuffer_Release(&hb);
    if (bad) {
        PyErr_SetString(PyExc_ValueError, "cell_ranks: array lengths do not agree");
        return NULL;
    }
    return PyLong_FromSsize_t(occupied);
}

/* select(cells, flags, rows) -> count: the rows (in order) whose cell is flagged,
   written to the front of rows (np.flatnonzero(flags[cells])); cells int64 or int32. */
static PyObject *
k_select(PyObject *self, PyObject *args)
{
    PyObject *co, *fo, *ro;
    if (!PyArg_ParseTuple(args, "OOO", &co, &fo, &ro))
        return NULL;
    Py_buffer cb, fb, rb;
    if (PyObject_GetBuffer(co, &cb, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0)
        return NULL;
    if ((cb.itemsize != 4 && cb.itemsize != 8) || cb.ndim > 1) {
        PyErr_SetString(PyExc_ValueError, "cells: expected a 1-D array of 4- or 8-byte items");
        PyBuffer_Release(&cb);
        return NULL;
    }
    if (get_buf(fo, &fb, 1, 0, "flags") < 0) {
        PyBuffer_Release(&cb);
        return NULL;
    }
    if (get_buf(ro, &rb, 8, 1, "rows") < 0) {
        PyBuffer_Release(&fb);
        PyBuffer_Release(&cb);
        return NULL;
    }
    Py_ssize_t n = cb.len / cb.itemsize, m = fb.len, k = 0;
    int bad = rb.len / 8 < n;
    if (!bad) {
        const int64_t *c64 = cb.itemsize == 8 ? (const int64_t *)cb.buf : NULL;
        const int32_t *c32 = cb.itemsize == 4 ? (const int32_t *)cb.buf : NULL;
        const uint8_t *flags = (const uint8_t *)fb.buf;
        int64_t *rows = (int64_t *)rb.buf;
        Py_BEGIN_ALLOW_THREADS
        for (Py_ssize_t i = 0; i < n; i++) {
            int64_t c = c32 ? (int64_t)c32[i] : c64[i];
            if (c < 0 || c >= m) {
                bad = 1;
                break;
            }
            rows[k] = i;
            k += flags[c] != 0;
        }
        Py_END_ALLOW_THREADS
    }
    PyBuffer_Release(&rb);
    PyBuffer_Release(&fb);
    PyBuffer_Release(&cb);
    if (bad) {
        PyErr_SetString(PyExc_ValueError, "select: rows too short or a cell out of range");
        return NULL;
    }
    return PyLong_FromSsize_t(k);
}

/* Stable sort of (key, weight) pairs by key: insertion sort for short runs,
   bottom-up merge sort otherwise (tmp holds n pairs). */
static void
sort_pairs(uint64_t *k, double *w, uint64_t *tk, double *tw, Py_ssize_t n)
{
    const Py_ssize_t RUN = 24;
    for (Py_ssize_t s = 0; s < n; s += RUN) {
        Py_ssize_t e = s + RUN < n ? s + RUN : n;
        for (Py_ssize_t i = s + 1; i < e; i++) {
            uint64_t kv = k[i];
            double wv = w[i];
            Py_ssize_t j = i;
            while (j > s && k[j - 1] > kv) {
                k[j] = k[j - 1];
                w[j] = w[j - 1];
                j--;
            }
            k[j] = kv;
            w[j] = wv;
        }
    }
    uint64_t *ak = k, *bk = tk;
    double *aw = w, *bw = tw;
    for (Py_ssize_t width = RUN; width < n; width *= 2) {
        for (Py_ssize_t lo = 0; lo < n; lo += 2 * width) {
            Py_ssize_t mid = lo + width < n ? lo + width : n;
            Py_ssize_t hi = lo + 2 * width < n ? lo + 2 * width : n;
            Py_ssize_t i = lo, j = mid, o = lo;
            while (i < mid && j < hi) {
                if (ak[j] < ak[i]) {  /* ties take the left run first: stable */
                    bk[o] = ak[j];
                    bw[o++] = aw[j++];
                } else {
                    bk[o] = ak[i];
                    bw[o++] = aw[i++];
                }
            }
            while (i < mid) {
                bk[o] = ak[i];
                bw[o++] = aw[i++];
            }
            while (j < hi) {
                bk[o] = ak[j];
                bw[o++] = aw[j++];
            }
        }
        uint64_t *t1 = ak; ak = bk; bk = t1;
        double *t2 = aw; aw = bw; bw = t2;
    }
    if (ak != k) {
        memcpy(k, ak, (size_t)n * 8);
        memcpy(w, aw, (size_t)n * 8);
    }
}

/* refine(x, w, cells, pidx, rows, npar, keys, weights, parents[, work]) -> groups

   The given rows (int64, in row order; each in a flagged first-level cell:
   cells holds each row's cell, int64 or int32, and pidx, int32, maps a cell
   to its parent index in [0, npar) or -1; parents are in cell order), sorted
   by key with ties in row order, grouped into distinct keys: keys, weight
   sums (0.0 plus each row's weight in that order, as np.bincount adds; 1.0
   per row when w is None) and parent of each group go to the front of the
   three outputs (each at least len(rows) long).  Returns the group count.
   The numpy route (summary._refine) computes the same numbers.  work, if
   given, is a writable byte buffer used as working memory when it holds at
   least 8 * (npar + 1 + 2 * (2 * len(rows) + 1)) bytes (a reused buffer saves
   the page faults of fresh memory on every call). */
static PyObject *
k_refine(PyObject *self, PyObject *args)
{
    PyObject *xo, *wo, *co, *po, *ro, *ko, *wout, *paro, *worko = Py_None;
    Py_ssize_t npar;
    if (!PyArg_ParseTuple(args, "OOOOOnOOO|O", &xo, &wo, &co, &po, &ro, &npar, &ko, &wout, &paro,
                          &worko))
        return NULL;
    int weighted = wo != Py_None;
    Py_buffer xb, wb, cb, pb, rb, kb, wob, parb, workb;
    int got = 0, have_work = 0;
    PyObject *res = NULL;
    if (get_buf(xo, &xb, 8, 0, "x") < 0)
        goto done;
    got = 1;
    if (weighted && get_buf(wo, &wb, 8, 0, "w") < 0)
        goto done;
    got = 2;
    if (PyObject_GetBuffer(co, &cb, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0)
        goto done;
    got = 3;
    if ((cb.itemsize != 4 && cb.itemsize != 8) || cb.ndim > 1) {
        PyErr_SetString(PyExc_ValueError, "cells: expected a 1-D array of 4- or 8-byte items");
        goto done;
    }
    if (get_buf(po, &pb, 4, 0, "pidx") < 0)
        goto done;
    got = 4;
    if (get_buf(ro, &rb, 8, 0, "rows") < 0)
        goto done;
    got = 5;
    if (get_buf(ko, &kb, 8, 1, "keys") < 0)
        goto done;
    got = 6;
    if (get_buf(wout, &wob, 8, 1, "weights") < 0)
        goto done;
    got = 7;
    if (get_buf(paro, &parb, 8, 1, "parents") < 0)
        goto done;
    got = 8;
    if (worko != Py_None) {
        if (get_buf(worko, &workb, 1, 1, "work") < 0)
            goto done;
        have_work = 1;
    }
    {
        Py_ssize_t n = xb.len / 8, m = pb.len / 4, total = rb.len / 8;
        if ((weighted && wb.len != xb.len) || cb.len / cb.itemsize != n || kb.len / 8 < total ||
            wob.len / 8 < total || parb.len / 8 < total || npar < 0) {
            PyErr_SetString(PyExc_ValueError, "refine: array lengths do not agree");
            goto done;
        }
        const double *x = (const double *)xb.buf;
        const double *w = weighted ? (const double *)wb.buf : NULL;
        const int64_t *c64 = cb.itemsize == 8 ? (const int64_t *)cb.buf : NULL;
        const int32_t *c32 = cb.itemsize == 4 ? (const int32_t *)cb.buf : NULL;
        const int32_t *pidx = (const int32_t *)pb.buf;
        const int64_t *rows = (const int64_t *)rb.buf;
        uint64_t *gk = (uint64_t *)kb.buf;
        double *gw = (double *)wob.buf;
        int64_t *gp = (int64_t *)parb.buf;
        Py_ssize_t groups = 0;
        int bad = 0;
        size_t need = (size_t)(npar + 1 + 2 * (2 * total + 1)) * 8;
        int own = !(have_work && (size_t)workb.len >= need);
        Py_BEGIN_ALLOW_THREADS
        char *mem = own ? (char *)PyMem_RawMalloc(need) : (char *)workb.buf;
        Py_ssize_t *pos = (Py_ssize_t *)mem;
        uint64_t *bk = (uint64_t *)(pos + (npar + 1));
        double *bw = (double *)(bk + (2 * total + 1));
        if (mem == NULL) {
            bad = 2;
        } else {
            /* rows per parent, then each parent's first slot */
            memset(pos, 0, (size_t)(npar + 1) * sizeof(Py_ssize_t));
            for (Py_ssize_t r = 0; r < total; r++) {
                int64_t i = rows[r];
                if (i < 0 || i >= n) {
                    bad = 1;
                    break;
                }
                int64_t c = c32 ? (int64_t)c32[i] : c64[i];
                if (c < 0 || c >= m || pidx[c] < 0 || pidx[c] >= npar) {
                    bad = 1;
                    break;
                }
                pos[pidx[c] + 1]++;
            }
            for (Py_ssize_t p = 0; p < npar && !bad; p++)
                pos[p + 1] += pos[p];
            for (Py_ssize_t r = 0; r < total && !bad; r++) {
                int64_t i = rows[r];
                int64_t c = c32 ? (int64_t)c32[i] : c64[i];
                Py_ssize_t j = pos[pidx[c]]++;
                bk[j] = float_key(x[i]);
                bw[j] = weighted ? w[i] : 1.0;
            }
            /* pos[p] is now the end of parent p's rows */
            Py_ssize_t start = 0;
            for (Py_ssize_t p = 0; p < npar && !bad; p++) {
                Py_ssize_t end = pos[p];
                Py_ssize_t len = end - start;
                if (len > 1)
                    sort_pairs(bk + start, bw + start, bk + total, bw + total, len);
                for (Py_ssize_t j = start; j < end; j++) {
                    if (j == start || bk[j] != bk[j - 1]) {
                        gk[groups] = bk[j];
                        gw[groups] = 0.0;
                        gp[groups] = p;
                        groups++;
                    }
                    gw[groups - 1] += bw[j];
                }
                start = end;
            }
        }
        if (own)
            PyMem_RawFree(mem);
        Py_END_ALLOW_THREADS
        if (bad == 2) {
            PyErr_NoMemory();
            goto done;
        }
        if (bad) {
            PyErr_SetString(PyExc_ValueError, "refine: rows, cells and pidx do not agree");
            goto done;
        }
        res = PyLong_FromSsize_t(groups);
    }
done:
    if (have_work) PyBuffer_Release(&workb);
    if (got >= 8) PyBuffer_Release(&parb);
    if (got >= 7) PyBuffer_Release(&wob);
    if (got >= 6) PyBuffer_Release(&kb);
    if (got >= 5) PyBuffer_Release(&rb);
    if (got >= 4) PyBuffer_Release(&pb);
    if (got >= 3) PyBuffer_Release(&cb);
    if (got >= 2 && weighted) PyBuffer_Release(&wb);
    if (got >= 1) PyBuffer_Release(&xb);
    return res;
}

/* compact(x, w, xout, wout, wmiss) -> kept: the non-NaN values of x (and their
   weights) in order into xout (wout); the weights of the NaN rows, in order,
   into wmiss (np.sum of them is numpy's w[isnan(x)].sum()).  Each output must
   be exactly as long as what it receives.  w, wout and wmiss are None for
   unweighted data. */
static PyObject *
k_compact(PyObject *self, PyObject *args)
{
    PyObject *xo, *wo, *xoo, *woo, *wmo;
    if (!PyArg_ParseTuple(args, "OOOOO", &xo, &wo, &xoo, &woo, &wmo))
        return NULL;
    int weighted = wo != Py_None;
    Py_buffer xb, wb, xob, wob, wmb;
    int got = 0;
    PyObject *res = NULL;
    if (get_buf(xo, &xb, 8, 0, "x") < 0)
        goto done;
    got = 1;
    if (weighted && get_buf(wo, &wb, 8, 0, "w") < 0)
        goto done;
    got = 2;
    if (get_buf(xoo, &xob, 8, 1, "xout") < 0)
        goto done;
    got = 3;
    if (weighted && get_buf(woo, &wob, 8, 1, "wout") < 0)
        goto done;
    got = 4;
    if (weighted && get_buf(wmo, &wmb, 8, 1, "wmiss") < 0)
        goto done;
    got = 5;
    {
        Py_ssize_t n = xb.len / 8, k = 0, j = 0;
        const double *x = (const double *)xb.buf;
        Py_ssize_t nan = 0;
        Py_BEGIN_ALLOW_THREADS
        for (Py_ssize_t i = 0; i < n; i++)
            nan += isnan(x[i]) != 0;
        Py_END_ALLOW_THREADS
        /* outputs hold exactly the kept rows (xout, wout) and the NaN rows (wmiss) */
        if (xob.len / 8 != n - nan || (weighted && (wb.len != xb.len || wob.len / 8 != n - nan ||
                                                    wmb.len / 8 != nan))) {
            PyErr_SetString(PyExc_ValueError, "compact: array lengths do not agree");
            goto done;
        }
        double *xout = (double *)xob.buf;
        Py_BEGIN_ALLOW_THREADS
        if (weighted) {
            const double *w = (const double *)wb.buf;
            double *wout = (double *)wob.buf, *wmiss = (double *)wmb.buf;
            for (Py_ssize_t i = 0; i < n; i++) {
                double v = x[i];
                if (isnan(v)) {
                    wmiss[j++] = w[i];
                } else {
                    xout[k] = v;
                    wout[k++] = w[i];
                }
            }
        } else {
            for (Py_ssize_t i = 0; i < n; i++) {
                double v = x[i];
                if (!isnan(v))
                    xout[k++] = v;
            }
        }
        Py_END_ALLOW_THREADS
        res = PyLong_FromSsize_t(k);
    }
done:
    if (got >= 5 && weighted) PyBuffer_Release(&wmb);
    if (got >= 4 && weighted) PyBuffer_Release(&wob);
    if (got >= 3) PyBuffer_Release(&xob);
    if (got >= 2 && weighted) PyBuffer_Release(&wb);
    if (got >= 1) PyBuffer_Release(&xb);
    return res;
}

/* merge_bounds(x, rmin, rmax, w, offsets, totals, z, lo, hi, wz) -> count

   The union z of the parts' values (part p is rows offsets[p]:offsets[p+1] of
   the concatenated x, rmin, rmax, w, each part strictly increasing; totals[p]
   its total weight) and, at each point, the sums over the parts (in part
   order, starting from 0.0) of their extended rank bounds: at an entry its
   own (rmin, rmax, w); between entries x_{g-1} < z < x_g, (rmin_{g-1} +
   w_{g-1}, rmax_g - w_g, 0); below a part's minimum (0, 0, 0) and above its
   maximum (total, total, 0).  summary._merged_bounds computes the same sums
   with numpy, in the same order. */
static PyObject *
k_merge_bounds(PyObject *self, PyObject *args)
{
    PyObject *o[10];
    if (!PyArg_ParseTuple(args, "OOOOOOOOOO", &o[0], &o[1], &o[2], &o[3], &o[4], &o[5], &o[6], &o[7],
                          &o[8], &o[9]))
        return NULL;
    static const char *names[10] = {"x", "rmin", "rmax", "w", "offsets", "totals", "z", "lo", "hi", "wz"};
    Py_buffer b[10];
    int got = 0;
    PyObject *res = NULL;
    for (; got < 10; got++) {
        if (get_buf(o[got], &b[got], 8, got >= 6, names[got]) < 0)
            goto done;
    }
    {
        Py_ssize_t n = b[0].len / 8, k = b[5].len / 8;
        const int64_t *off = (const int64_t *)b[4].buf;
        int bad = b[4].len / 8 != k + 1 || k < 1 || b[1].len != b[0].len || b[2].len != b[0].len ||
                  b[3].len != b[0].len;
        for (int i = 6; i < 10 && !bad; i++)
            bad = b[i].len < b[0].len;
        if (!bad) {
            bad = off[0] != 0 || off[k] != n;
            for (Py_ssize_t p = 0; p < k && !bad; p++)
                bad = off[p + 1] < off[p];
        }
        if (bad) {
            PyErr_SetString(PyExc_ValueError, "merge_bounds: array lengths or offsets do not agree");
            goto done;
        }
        const double *x = (const double *)b[0].buf, *rmin = (const double *)b[1].buf;
        const double *rmax = (const double *)b[2].buf, *w = (const double *)b[3].buf;
        const double *tot = (const double *)b[5].buf;
        double *z = (double *)b[6].buf, *lo = (double *)b[7].buf, *hi = (double *)b[8].buf;
        double *wz = (double *)b[9].buf;
        Py_ssize_t count = 0;
        int nomem = 0;
        Py_BEGIN_ALLOW_THREADS
        /* per part: its next entry g, that entry's value h (NaN once the part is used
           up: it never compares equal and never wins the minimum), and the bounds it
           adds at a point that is not one of its entries (cl, ch), updated only when
           the part moves on.  Each term and the order of the additions are those of
           the definition above, so the sums are the same bits. */
        Py_ssize_t *g = (Py_ssize_t *)PyMem_RawMalloc((size_t)k * sizeof(Py_ssize_t));
        double *st = (double *)PyMem_RawMalloc((size_t)(3 * k + 1) * sizeof(double));
        if (g == NULL || st == NULL) {
            nomem = 1;
        } else {
            double *h = st, *cl = st + k, *ch = st + 2 * k;
            Py_ssize_t left = 0;
            for (Py_ssize_t p = 0; p < k; p++) {
                g[p] = off[p];
                h[p] = off[p] < off[p + 1] ? x[off[p]] : NAN;
                cl[p] = ch[p] = 0.0;  /* below the part's minimum (or an empty part) */
                left += off[p + 1] - off[p];
            }
            while (left > 0) {
                /* the smallest head: four independent minima (a NaN head never wins) */
                double v0 = INFINITY, v1 = INFINITY, v2 = INFINITY, v3 = INFINITY;
                Py_ssize_t p4 = 0;
                for (; p4 + 4 <= k; p4 += 4) {
                    v0 = h[p4] < v0 ? h[p4] : v0;
                    v1 = h[p4 + 1] < v1 ? h[p4 + 1] : v1;
                    v2 = h[p4 + 2] < v2 ? h[p4 + 2] : v2;
                    v3 = h[p4 + 3] < v3 ? h[p4 + 3] : v3;
                }
                for (; p4 < k; p4++)
                    v0 = h[p4] < v0 ? h[p4] : v0;
                v0 = v1 < v0 ? v1 : v0;
                v2 = v3 < v2 ? v3 : v2;
                double v = v2 < v0 ? v2 : v0;
                double sl = 0.0, sh = 0.0, sw = 0.0;
                for (Py_ssize_t p = 0; p < k; p++) {
                    double fl, fh, fw = 0.0;
                    if (h[p] == v) {
                        Py_ssize_t j = g[p], e = off[p + 1];
                        fl = rmin[j];
                        fh = rmax[j];
                        fw = w[j];
                        g[p] = j + 1;
                        left--;
                        if (j + 1 < e) {
                            h[p] = x[j + 1];
                            cl[p] = rmin[j] + w[j];
                            ch[p] = rmax[j + 1] - w[j + 1];
                        } else {
                            h[p] = NAN;
                            cl[p] = ch[p] = tot[p];  /* above the part's maximum */
                        }
                    } else {
                        fl = cl[p];
                        fh = ch[p];
                    }
                    sl += fl;
                    sh += fh;
                    sw += fw;
                }
                z[count] = v;
                lo[count] = sl;
                hi[count] = sh;
                wz[count] = sw;
                count++;
            }
        }
        PyMem_RawFree(st);
        PyMem_RawFree(g);
        Py_END_ALLOW_THREADS
        if (nomem) {
            PyErr_NoMemory();
            goto done;
        }
        res = PyLong_FromSsize_t(count);
    }
done:
    for (int i = got - 1; i >= 0; i--)
        PyBuffer_Release(&b[i]);
    return res;
}

/* bitpack(v, block, out) -> bytes: one bit-packed stream of the blob format's
   `packed` layout (docs/FORMAT.md): one width byte per block of `block` values
   (the bit length of the block's largest value), then every block's values in
   that many bits, least significant bit first, blocks back to back, zero
   padding to a whole byte.  out must hold ceil(m / block) + 8 * m + 8 bytes. */
static PyObject *
k_bitpack(PyObject *self, PyObject *args)
{
    PyObject *vo, *oo;
    Py_ssize_t block;
    if (!PyArg_ParseTuple(args, "OnO", &vo, &block, &oo))
        return NULL;
    if (block < 1) {
        PyErr_SetString(PyExc_ValueError, "bitpack: block must be >= 1");
        return NULL;
    }
    Py_buffer vb, ob;
    if (get_buf(vo, &vb, 8, 0, "v") < 0)
        return NULL;
    if (get_buf(oo, &ob, 1, 1, "out") < 0) {
        PyBuffer_Release(&vb);
        return NULL;
    }
    Py_ssize_t m = vb.len / 8, nb = (m + block - 1) / block;
    if (ob.len < nb + 8 * m + 8) {
        PyBuffer_Release(&ob);
        PyBuffer_Release(&vb);
        PyErr_SetString(PyExc_ValueError, "bitpack: out too short");
        return NULL;
    }
    const uint64_t *v = (const uint64_t *)vb.buf;
    uint8_t *out = (uint8_t *)ob.buf;
    Py_ssize_t pos = nb;
    Py_BEGIN_ALLOW_THREADS
    uint64_t acc = 0;
    int nacc = 0;
    for (Py_ssize_t b = 0; b < nb; b++) {
        Py_ssize_t s0 = b * block, s1 = s0 + block < m ? s0 + block : m;
        uint64_t o = 0;
        for (Py_ssize_t i = s0; i < s1; i++)
            o |= v[i];
        int wd = o ? 64 - __builtin_clzll(o) : 0;
        out[b] = (uint8_t)wd;
        if (!wd)
            continue;
        for (Py_ssize_t i = s0; i < s1; i++) {
            uint64_t x = v[i];
            acc |= x << nacc;  /* nacc < 64 here */
            if (nacc + wd >= 64) {
                for (int k = 0; k < 8; k++)
                    out[pos++] = (uint8_t)(acc >> (8 * k));
                int used = 64 - nacc;  /* bits of x already placed */
                acc = used < 64 ? x >> used : 0;
                nacc = wd - used;
            } else {
                nacc += wd;
            }
        }
    }
    for (int k = 0; k < (nacc + 7) / 8; k++)
        out[pos++] = (uint8_t)(acc >> (8 * k));
    Py_END_ALLOW_THREADS
    PyBuffer_Release(&ob);
    PyBuffer_Release(&vb);
    return PyLong_FromSsize_t(pos);
}

/* bitunpack(data, m, block, out): the m values of a stream written by bitpack
   (the caller has checked its widths and length, as summary payloads do before
   decoding; a short stream raises ValueError rather than reading past it). */
static PyObject *
k_bitunpack(PyObject *self, PyObject *args)
{
    PyObject *bo, *oo;
    Py_ssize_t m, block;
    if (!PyArg_ParseTuple(args, "OnnO", &bo, &m, &block, &oo))
        return NULL;
    if (block < 1 || m < 0) {
        PyErr_SetString(PyExc_ValueError, "bitunpack: expected block >= 1 and m >= 0");
        return NULL;
    }
    Py_buffer bb, ob;
    if (PyObject_GetBuffer(bo, &bb, PyBUF_C_CONTIGUOUS) < 0)
        return NULL;
    if (get_buf(oo, &ob, 8, 1, "out") < 0) {
        PyBuffer_Release(&bb);
        return NULL;
    }
    const uint8_t *d = (const uint8_t *)bb.buf;
    Py_ssize_t len = bb.len, nb = (m + block - 1) / block;
    uint64_t *out = (uint64_t *)ob.buf;
    int bad = ob.len / 8 < m || len < nb;
    if (!bad) {
        int r;
        Py_BEGIN_ALLOW_THREADS
        r = read_stream(d, len, m, block, out);
        Py_END_ALLOW_THREADS
        bad = r != 0;
    }
    PyBuffer_Release(&ob);
    PyBuffer_Release(&bb);
    if (bad) {
        PyErr_SetString(PyExc_ValueError, "bitunpack: stream too short for its widths, or a width above 64");
        return NULL;
    }
    Py_RETURN_NONE;
}

/* The bit reader of bitunpack and unpack_packed: returns -1 when the stream's
   length is not the one its widths need, a padding bit is set or a width exceeds 64. */
static int
read_stream(const uint8_t *d, Py_ssize_t len, Py_ssize_t m, Py_ssize_t block, uint64_t *out)
{
    Py_ssize_t nb = (m + block - 1) / block;
    if (len < nb)
        return -1;
    long long bits = 0;
    for (Py_ssize_t b = 0; b < nb; b++) {
        Py_ssize_t s0 = b * block, s1 = s0 + block < m ? s0 + block : m;
        if (d[b] > 64)
            return -1;
        bits += (long long)d[b] * (s1 - s0);
    }
    /* exactly the bytes the widths need, and zero padding bits (as blob._check_bits) */
    if (len - nb != (bits + 7) / 8 || (bits % 8 && (d[len - 1] >> (bits % 8))))
        return -1;
    /* a zero-padded copy of the data, so that every value is two 8-byte loads */
    Py_ssize_t dlen = len - nb;
    uint8_t *p = (uint8_t *)PyMem_RawMalloc((size_t)dlen + 16);
    if (p == NULL)
        return -2;
    memcpy(p, d + nb, (size_t)dlen);
    memset(p + dlen, 0, 16);
    unsigned long long pos = 0;  /* bit position */
    for (Py_ssize_t b = 0; b < nb; b++) {
        int wd = d[b];
        Py_ssize_t s0 = b * block, s1 = s0 + block < m ? s0 + block : m;
        if (wd == 0) {
            for (Py_ssize_t i = s0; i < s1; i++)
                out[i] = 0;
            continue;
        }
        uint64_t mask = wd == 64 ? UINT64_MAX : ((UINT64_C(1) << wd) - 1);
        for (Py_ssize_t i = s0; i < s1; i++) {
            uint64_t lo, hi;
            unsigned sh = (unsigned)(pos & 7);
            memcpy(&lo, p + (pos >> 3), 8);
            memcpy(&hi, p + (pos >> 3) + 8, 8);
            uint64_t v = sh ? (lo >> sh) | (hi << (64 - sh)) : lo;  /* little-endian host */
            out[i] = v & mask;
            pos += (unsigned)wd;
        }
    }
    PyMem_RawFree(p);
    return 0;
}

static inline uint64_t
unzigzag(uint64_t z)
{
    return (z >> 1) ^ (uint64_t)(-(int64_t)(z & 1));
}

/* second-order prediction, inverted (blob._unpredict): out[0] = start, out[i] = start +
   sum_{j<=i} (sum_{l<=j} unzigzag(c[l])) << shift, all modulo 2**64 */
static void
unpredict(uint64_t start, int shift, const uint64_t *c, Py_ssize_t m, uint64_t *out)
{
    uint64_t d = 0, acc = 0;
    out[0] = start;
    for (Py_ssize_t i = 0; i < m; i++) {
        d += unzigzag(c[i]);
        acc += d << shift;
        out[i + 1] = acc + start;
    }
}

static inline double
key_value(uint64_t k)
{
    int64_t i = (int64_t)(k ^ (UINT64_C(1) << 63));
    int64_t s = i >> 63;
    i = (i ^ s) - s;
    i |= s & INT64_MIN;
    double v;
    memcpy(&v, &i, 8);
    return v;
}

/* unpack_packed(xbits, rbits, wbits, ubits, n, block, xstart, xshift, rstart, rshift, q,
                 x, lo, hi, w) -> code

   The entries of a `packed` summary payload (docs/FORMAT.md), as blob._unpack_packed
   and summary_from_payload compute them: values x from their keys, and, unless rbits
   is None (an exact payload: w gets the integer weights), lo = rmin_q * q, w = w_q * q,
   hi = (rmin_q + w_q + u_q) * q.  Codes: 0 fine; 1 a stream too short or a width above
   64; 2, 3, 4 a quantized rmin, w or u above 2**62; 5 values NaN or not strictly
   increasing; 6 a rank field not finite; 7 an exact weight not below 2**53. */
static PyObject *
k_unpack_packed(PyObject *self, PyObject *args)
{
    PyObject *bo[4], *oo[4];
    Py_ssize_t n, block;
    unsigned long long xstart, rstart;
    int xshift, rshift;
    double q;
    if (!PyArg_ParseTuple(args, "OOOOnnKiKidOOOO", &bo[0], &bo[1], &bo[2], &bo[3], &n, &block,
                          &xstart, &xshift, &rstart, &rshift, &q, &oo[0], &oo[1], &oo[2], &oo[3]))
        return NULL;
    int exact = bo[1] == Py_None;
    if (n < 1 || block < 1 || xshift < 0 || xshift > 63 || rshift < 0 || rshift > 63) {
        PyErr_SetString(PyExc_ValueError, "unpack_packed: bad n, block or shift");
        return NULL;
    }
    Py_buffer bb[4], ob[4];
    int gb = 0, go = 0, code = 0;
    PyObject *res = NULL;
    for (; gb < 4; gb++) {
        if (bo[gb] == Py_None)
            continue;
        if (PyObject_GetBuffer(bo[gb], &bb[gb], PyBUF_C_CONTIGUOUS) < 0)
            goto done;
    }
    for (; go < 4; go++) {
        if (oo[go] == Py_None)
            continue;
        if (get_buf(oo[go], &ob[go], 8, 1, "out") < 0)
            goto done;
        if (ob[go].len / 8 < n) {
            PyErr_SetString(PyExc_ValueError, "unpack_packed: output too short");
            go++;
            goto done;
        }
    }
    if (!exact && (oo[1] == Py_None || oo[2] == Py_None || bo[3] == Py_None)) {
        PyErr_SetString(PyExc_ValueError, "unpack_packed: rank streams and outputs go together");
        goto done;
    }
    {
        double *x = (double *)ob[0].buf, *w = (double *)ob[3].buf;
        double *lo = exact ? NULL : (double *)ob[1].buf, *hi = exact ? NULL : (double *)ob[2].buf;
        int nomem = 0;
        Py_BEGIN_ALLOW_THREADS
        uint64_t *t = (uint64_t *)PyMem_RawMalloc((size_t)(4 * n + 4) * 8);
        if (t == NULL) {
            nomem = 1;
        } else {
            uint64_t *kx = t, *kr = t + n + 1, *kw = t + 2 * n + 2, *ku = t + 3 * n + 3;
            const uint64_t LIM = UINT64_C(1) << 62;
            /* streams: x codes (n - 1), rmin codes (n - 1), w (n), u codes (n) */
            if (read_stream((const uint8_t *)bb[0].buf, bb[0].len, n - 1, block, ku) ||
                read_stream((const uint8_t *)bb[2].buf, bb[2].len, n, block, kw) ||
                (!exact && read_stream((const uint8_t *)bb[1].buf, bb[1].len, n - 1, block, kx))) {
                code = 1;
            } else {
                /* ku holds the x codes for now; kx the rmin codes */
                unpredict(xstart, xshift, ku, n - 1, kr);  /* kr: the value keys */
                for (Py_ssize_t i = 0; i < n; i++)
                    x[i] = key_value(kr[i]);
                if (!exact) {
                    unpredict(rstart, rshift, kx, n - 1, kr);  /* kr: rmin_q */
                    if (read_stream((const uint8_t *)bb[3].buf, bb[3].len, n, block, ku))
                        code = 1;
                    uint64_t u = 0;
                    for (Py_ssize_t i = 0; i < n && !code; i++) {
                        u += unzigzag(ku[i]);
                        ku[i] = u;
                    }
                    for (Py_ssize_t i = 0; i < n && !code; i++)
                        code = kr[i] > LIM ? 2 : 0;
                    for (Py_ssize_t i = 0; i < n && !code; i++)
                        code = kw[i] > LIM ? 3 : 0;
                    for (Py_ssize_t i = 0; i < n && !code; i++)
                        code = ku[i] > LIM ? 4 : 0;
                }
                for (Py_ssize_t i = 0; i < n && !code; i++)
                    code = isnan(x[i]) || (i > 0 && !(x[i] > x[i - 1])) ? 5 : 0;
                if (!code && exact) {
                    for (Py_ssize_t i = 0; i < n && !code; i++) {
                        code = kw[i] >= (UINT64_C(1) << 53) ? 7 : 0;
                        w[i] = (double)kw[i];
                    }
                } else if (!code) {
                    for (Py_ssize_t i = 0; i < n; i++) {
                        lo[i] = (double)kr[i] * q;
                        w[i] = (double)kw[i] * q;
                        hi[i] = (double)(kr[i] + kw[i] + ku[i]) * q;
                        if (!(isfinite(lo[i]) && isfinite(w[i]) && isfinite(hi[i])))
                            code = 6;
                    }
                }
            }
            PyMem_RawFree(t);
        }
        Py_END_ALLOW_THREADS
        if (nomem) {
            PyErr_NoMemory();
            goto done;
        }
        res = PyLong_FromLong(code);
    }
done:
    for (int i = 0; i < go; i++)
        if (oo[i] != Py_None)
            PyBuffer_Release(&ob[i]);
    for (int i = 0; i < gb; i++)
        if (bo[i] != Py_None)
            PyBuffer_Release(&bb[i]);
    return res;
}

/* weights_ok(w) -> index of the first weight that is NaN, infinite or negative, or -1. */
static PyObject *
k_weights_ok(PyObject *self, PyObject *args)
{
    PyObject *wo;
    if (!PyArg_ParseTuple(args, "O", &wo))
        return NULL;
    Py_buffer wb;
    if (get_buf(wo, &wb, 8, 0, "w") < 0)
        return NULL;
    const double *w = (const double *)wb.buf;
    Py_ssize_t n = wb.len / 8, bad = -1;
    Py_BEGIN_ALLOW_THREADS
    for (Py_ssize_t i = 0; i < n; i++) {
        double v = w[i];
        if (!(v >= 0.0 && v < INFINITY)) {
            bad = i;
            break;
        }
    }
    Py_END_ALLOW_THREADS
    PyBuffer_Release(&wb);
    return PyLong_FromSsize_t(bad);
}

static PyMethodDef methods[] = {
    {"scan", k_scan, METH_VARARGS, "scan(x) -> (nan_count, vmin, vmax, order)"},
    {"first_level", k_first_level, METH_VARARGS,
     "first_level(x, w, emin, ncell, base, heavy, cells, table[, wide])"},
    {"cell_ranks", k_cell_ranks, METH_VARARGS, "cell_ranks(h, cnt, d, ex, pos) -> occupied"},
    {"select", k_select, METH_VARARGS, "select(cells, flags, rows) -> count"},
    {"refine", k_refine, METH_VARARGS,
     "refine(x, w, cells, pidx, rows, npar, keys, weights, parents[, work]) -> groups"},
    {"merge_bounds", k_merge_bounds, METH_VARARGS,
     "merge_bounds(x, rmin, rmax, w, offsets, totals, z, lo, hi, wz) -> count"},
    {"bitpack", k_bitpack, METH_VARARGS, "bitpack(v, block, out) -> bytes written"},
    {"bitunpack", k_bitunpack, METH_VARARGS, "bitunpack(data, m, block, out)"},
    {"unpack_packed", k_unpack_packed, METH_VARARGS,
     "unpack_packed(xbits, rbits, wbits, ubits, n, block, xstart, xshift, rstart, rshift, q, x, lo, hi, w)"},
    {"compact", k_compact, METH_VARARGS, "compact(x, w, xout, wout, wmiss) -> kept"},
    {"weights_ok", k_weights_ok, METH_VARARGS, "weights_ok(w) -> first bad index or -1"},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "sketchmerge._kernels",
    "Fused row passes of the sketch core (optional; see summary.py).", -1, methods,
};

PyMODINIT_FUNC
PyInit__kernels(void)
{
    return PyModule_Create(&module);
}
