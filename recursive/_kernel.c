/*
 * recursive._kernel: the per-sample linear algebra of the square-root information form.
 *
 * The posterior is an upper-triangular R (R^T R = Lambda, the precision) and a vector z
 * (R^T z = Lambda m).  For the small n this package works with, a call into numpy or
 * LAPACK costs more in argument handling than in arithmetic, so the few operations done on
 * every sample are written out here with Givens rotations, Householder reflections and
 * triangular substitutions.
 *
 * Arrays come in through the buffer protocol (any exporter of a C-contiguous float64
 * buffer; numpy is not needed to build this) and are modified in place.  Only the upper
 * triangle of R is ever read or written.  recursive/_givens.py is the same API in Python
 * and is the reference for what each function computes.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <float.h>
#include <math.h>
#include <string.h>

/* Largest n accepted (recursive.basis.MAX_TERMS is the same): an R of 8 MiB. */
#define MAX_N 1024
/* Up to this n the vector workspaces are on the stack (2 KiB each), above it on the heap. */
#define SMALL_WORK 256
/* Up to this n, random_walk keeps its two n x n workspaces on the stack (16 KiB). */
#define SMALL_N 32

/* ------------------------------------------------------------------ workspaces */

/* A workspace of n doubles: the stack buffer for n <= SMALL_WORK, else the heap. */
typedef struct {
    double stack[SMALL_WORK];
    double *p;
} Work;

/* Point w->p at n doubles; NULL (with MemoryError set) when the heap has none. */
static double *
work_get(Work *w, Py_ssize_t n)
{
    if (n <= SMALL_WORK) {
        w->p = w->stack;
    }
    else if ((w->p = PyMem_Malloc((size_t)n * sizeof(double))) == NULL) {
        PyErr_NoMemory();
    }
    return w->p;
}

static void
work_free(Work *w)
{
    if (w->p != NULL && w->p != w->stack) {
        PyMem_Free(w->p);
    }
    w->p = NULL;
}

/* ------------------------------------------------------------------ argument checks */

/* A set of buffers acquired by one call, released together on every exit path. */
typedef struct {
    Py_buffer view[9];  /* the most any function holds: stabilized_rows_many */
    int count;
} Buffers;

static void
release_all(Buffers *b)
{
    for (int i = 0; i < b->count; i++) {
        PyBuffer_Release(&b->view[i]);
    }
    b->count = 0;
}

static int
is_float64(const Py_buffer *v)
{
    const char *f = v->format;
    if (f == NULL || v->itemsize != (Py_ssize_t)sizeof(double)) {
        return 0;
    }
    /* '@', '=' and no prefix mean native byte order; '<' is native on little-endian. */
#if PY_LITTLE_ENDIAN
    if (f[0] == '@' || f[0] == '=' || f[0] == '<') {
        f++;
    }
#else
    if (f[0] == '@' || f[0] == '=' || f[0] == '>' || f[0] == '!') {
        f++;
    }
#endif
    return f[0] == 'd' && f[1] == '\0';
}

/*
 * Acquire obj as a C-contiguous float64 array with `ndim` dimensions, each of length n
 * (n = -1: all as long as the first, which may have any length; n = -2: any shape, which
 * get_matrix checks).  On success the buffer is added to
 * `bufs` and its data pointer returned; on failure an exception is set, nothing is held,
 * and NULL is returned.
 */
static double *
get_array(Buffers *bufs, PyObject *obj, const char *name, int ndim, Py_ssize_t n,
          int writable)
{
    Py_buffer *v = &bufs->view[bufs->count];
    if (PyObject_GetBuffer(obj, v, PyBUF_RECORDS_RO) < 0) {
        if (PyErr_ExceptionMatches(PyExc_BufferError)) {
            PyErr_Clear();
            PyErr_Format(PyExc_ValueError, "%s: cannot get a strided buffer from %.100s",
                         name, Py_TYPE(obj)->tp_name);
        }
        else if (PyErr_ExceptionMatches(PyExc_TypeError)) {
            PyErr_Clear();
            PyErr_Format(PyExc_TypeError, "%s must be a float64 array, got %.100s", name,
                         Py_TYPE(obj)->tp_name);
        }
        return NULL;
    }
    if (!is_float64(v)) {
        PyErr_Format(PyExc_TypeError, "%s must be a float64 array (buffer format 'd'), "
                     "got format '%s'", name, v->format ? v->format : "B");
        goto fail;
    }
    if (v->ndim != ndim) {
        PyErr_Format(PyExc_ValueError, "%s must have %d dimension(s), got %d", name, ndim,
                     v->ndim);
        goto fail;
    }
    if (n == -2) {
        n = -1;  /* any shape: get_matrix checks it */
    }
    else if (n < 0) {
        n = v->shape[0];
    }
    for (int d = 0; d < ndim && n >= 0; d++) {
        if (v->shape[d] != n) {
            if (ndim == 1) {
                PyErr_Format(PyExc_ValueError, "%s must have shape (%zd,), got (%zd,)", name,
                             n, v->shape[0]);
            }
            else {
                PyErr_Format(PyExc_ValueError, "%s must have shape (%zd, %zd), got (%zd, %zd)",
                             name, n, n, v->shape[0], v->shape[1]);
            }
            goto fail;
        }
    }
    if (!PyBuffer_IsContiguous(v, 'C')) {
        PyErr_Format(PyExc_ValueError, "%s must be C-contiguous", name);
        goto fail;
    }
    if (writable && v->readonly) {
        PyErr_Format(PyExc_ValueError, "%s must be writable, got a read-only buffer", name);
        goto fail;
    }
    bufs->count++;
    return (double *)v->buf;
fail:
    PyBuffer_Release(v);
    return NULL;
}

/*
 * Acquire obj as a C-contiguous float64 matrix of shape (rows, cols); rows < 0 accepts any
 * number of rows.  Same contract as get_array.
 */
static double *
get_matrix(Buffers *bufs, PyObject *obj, const char *name, Py_ssize_t rows, Py_ssize_t cols,
           int writable)
{
    double *p = get_array(bufs, obj, name, 2, -2, writable);
    if (p == NULL) {
        return NULL;
    }
    Py_buffer *v = &bufs->view[bufs->count - 1];
    if ((rows >= 0 && v->shape[0] != rows) || v->shape[1] != cols) {
        if (rows >= 0) {
            PyErr_Format(PyExc_ValueError, "%s must have shape (%zd, %zd), got (%zd, %zd)", name,
                         rows, cols, v->shape[0], v->shape[1]);
        }
        else {
            PyErr_Format(PyExc_ValueError, "%s must have shape (k, %zd), got (%zd, %zd)", name,
                         cols, v->shape[0], v->shape[1]);
        }
        PyBuffer_Release(v);
        bufs->count--;
        return NULL;
    }
    return p;
}

/* Raise if n is above MAX_N. */
static int
check_n(Py_ssize_t n)
{
    if (n > MAX_N) {
        PyErr_Format(PyExc_ValueError, "n must be at most %d, got %zd", MAX_N, n);
        return -1;
    }
    return 0;
}

/*
 * Raise if a buffer that is written (the first n_out of them) shares memory with any other
 * buffer: it would be overwritten while still being read.
 */
static int
check_disjoint(const Buffers *b, const char *const *names, int n_out)
{
    for (int i = 0; i < n_out && i < b->count; i++) {
        const char *lo_i = (const char *)b->view[i].buf, *hi_i = lo_i + b->view[i].len;
        for (int j = i + 1; j < b->count; j++) {
            const char *lo_j = (const char *)b->view[j].buf, *hi_j = lo_j + b->view[j].len;
            if (lo_i < hi_j && lo_j < hi_i) {
                PyErr_Format(PyExc_ValueError, "%s and %s must not share memory", names[i],
                             names[j]);
                return -1;
            }
        }
    }
    return 0;
}

static int
get_double(PyObject *obj, const char *name, double *out)
{
    double v = PyFloat_AsDouble(obj);
    if (v == -1.0 && PyErr_Occurred()) {
        PyErr_Clear();
        PyErr_Format(PyExc_TypeError, "%s must be a real number, got %R", name, obj);
        return -1;
    }
    *out = v;
    return 0;
}

static int
check_nargs(const char *fname, Py_ssize_t nargs, Py_ssize_t want)
{
    if (nargs != want) {
        PyErr_Format(PyExc_TypeError, "%s() takes %zd positional arguments, got %zd", fname,
                     want, nargs);
        return -1;
    }
    return 0;
}

/* ------------------------------------------------------------------ numerics */

/*
 * Rotate the row [w, y] (zero before column i0) into the rows i0.. of the triangular
 * [R | z], one Givens rotation per column, and return what is left of y.
 *
 * In column i the rotation [c s; -s c] with r = hypot(R_ii, w_i), c = R_ii / r,
 * s = w_i / r maps (R_ii, w_i) to (r, 0): the new diagonal is non-negative whatever the
 * sign of the old one, and w_i becomes exactly 0, so w ends as zeros.  When both are zero
 * there is nothing to rotate in that column.  hypot avoids overflow in r.
 */
/*
 * sqrt(a^2 + b^2) for the rotations.  libm's hypot guards against overflow and underflow at
 * every call, which costs more than the rest of a small rotation; the plain formula is exact
 * enough (within an ulp) whenever the squares can neither overflow nor underflow, and the
 * guarded call is kept for the extremes.
 */
static inline double
norm2(double a, double b)
{
    double aa = fabs(a), bb = fabs(b);
    double m = aa > bb ? aa : bb;
    if (m > 1e150 || m < 1e-150) {
        return hypot(a, b);
    }
    return sqrt(a * a + b * b);
}

/*
 * Apply the plane rotation [c s; -s c] to entries j0..n-1 of the rows u and v.  The rows never
 * overlap (restrict), which lets the compiler vectorize the loop.
 */
static inline void
rotate_pair(double *restrict u, double *restrict v, double c, double s, Py_ssize_t j0,
            Py_ssize_t n)
{
    for (Py_ssize_t j = j0; j < n; j++) {
        double t = u[j];
        u[j] = c * t + s * v[j];
        v[j] = c * v[j] - s * t;
    }
}

static double
rotate_in(double *R, double *z, double *w, double y, Py_ssize_t n, Py_ssize_t i0)
{
    for (Py_ssize_t i = i0; i < n; i++) {
        double *Ri = R + i * n;
        double a = Ri[i], b = w[i];
        if (a == 0.0 && b == 0.0) {
            continue;
        }
        double r = norm2(a, b), c = a / r, s = b / r;
        Ri[i] = r;
        w[i] = 0.0;
        rotate_pair(Ri, w, c, s, i + 1, n);
        double t = z[i];
        z[i] = c * t + s * y;
        y = c * y - s * t;
    }
    return y;
}

/*
 * Row kernels of random_walk, four rows at a time: each pass over the shared vector then
 * serves four rows, which matters because the rows are short (n <= a few dozen).
 */
static inline void
acc_rows(double *restrict s, const double *restrict const *rows, const double *w, int m,
         Py_ssize_t k)
{
    if (m == 4) {
        const double *restrict r0 = rows[0], *restrict r1 = rows[1], *restrict r2 = rows[2],
                     *restrict r3 = rows[3];
        double w0 = w[0], w1 = w[1], w2 = w[2], w3 = w[3];
        for (Py_ssize_t j = 0; j < k; j++) {
            s[j] += (w0 * r0[j] + w1 * r1[j]) + (w2 * r2[j] + w3 * r3[j]);
        }
        return;
    }
    for (int q = 0; q < m; q++) {
        const double *restrict r = rows[q];
        double wq = w[q];
        for (Py_ssize_t j = 0; j < k; j++) {
            s[j] += wq * r[j];
        }
    }
}

static inline void
sub_rows(double *restrict const *rows, const double *restrict s, const double *g, int m,
         Py_ssize_t k)
{
    if (m == 4) {
        double *restrict r0 = rows[0], *restrict r1 = rows[1], *restrict r2 = rows[2],
               *restrict r3 = rows[3];
        double g0 = g[0], g1 = g[1], g2 = g[2], g3 = g[3];
        for (Py_ssize_t j = 0; j < k; j++) {
            double sj = s[j];
            r0[j] -= g0 * sj;
            r1[j] -= g1 * sj;
            r2[j] -= g2 * sj;
            r3[j] -= g3 * sj;
        }
        return;
    }
    for (int q = 0; q < m; q++) {
        double *restrict r = rows[q];
        double gq = g[q];
        for (Py_ssize_t j = 0; j < k; j++) {
            r[j] -= gq * s[j];
        }
    }
}

/*
 * x[j] -= sum_q u[q] rows[q][j] over j >= l, where rows[q] is row l + q of an upper-
 * triangular array and so is only read from column l + q on.
 */
static inline void
sub_staggered(double *restrict x, const double *restrict const *rows, const double *u,
              Py_ssize_t l, Py_ssize_t n)
{
    const double *restrict r0 = rows[0], *restrict r1 = rows[1], *restrict r2 = rows[2],
                 *restrict r3 = rows[3];
    double u0 = u[0], u1 = u[1], u2 = u[2], u3 = u[3];
    x[l] -= u0 * r0[l];
    x[l + 1] -= u0 * r0[l + 1] + u1 * r1[l + 1];
    x[l + 2] -= (u0 * r0[l + 2] + u1 * r1[l + 2]) + u2 * r2[l + 2];
    for (Py_ssize_t j = l + 3; j < n; j++) {
        x[j] -= (u0 * r0[j] + u1 * r1[j]) + (u2 * r2[j] + u3 * r3[j]);
    }
}

/*
 * SRIF time update for a random walk with covariance increment c I.
 *
 * The new information matrix is Lambda' = Lambda (I + c Lambda)^{-1}, which by the
 * push-through identity equals R^T (I + c R R^T)^{-1} R.  Let U be the lower-triangular
 * factor with U^T U = I + c R R^T.  Then R' = U^{-T} R is upper triangular (a product of
 * two upper-triangular matrices) and R'^T R' = Lambda'; likewise z' = U^{-T} z gives
 * R'^T z' = (I + c Lambda)^{-1} eta, so the mean is unchanged.
 *
 * U comes from plane rotations of the stacked [I; sqrt(c) R^T] (a QL factorization), so
 * R R^T is never formed.  Column k (from the last) is cleared by rotating top row k, still
 * e_k at that point, with every bottom row i >= k: bottom row i starts as column i of R
 * (entries 0..i), and after columns > k are cleared every row lives in columns 0..k.  The
 * top rows end as U with a diagonal >= 1, so the triangular solve U^T R' = R is always
 * defined and R may be singular.  R' keeps the sign of R's diagonal (R'_ii = R_ii / U_ii);
 * rows with a negative diagonal are negated at the end (an orthogonal change).
 *
 * The reflections cost about 2/3 n^3 flops and the solve n^3 / 3, against about 3 n^3 for rotating
 * the 2n x (2n + 1) SRIF array [-w I, w I, 0; R, 0, z] directly.
 */
static int
random_walk_impl(double *R, double *z, Py_ssize_t n, double c)
{
    double stack[2 * SMALL_N * SMALL_N];
    double *work = stack;
    if (n > SMALL_N) {
        work = PyMem_Malloc(2 * (size_t)n * (size_t)n * sizeof(double));
        if (work == NULL) {
            PyErr_NoMemory();
            return -1;
        }
    }
    double *T = work, *B = work + n * n;
    double sc = sqrt(c);
    for (Py_ssize_t i = 0; i < n; i++) {
        double *Ti = T + i * n, *Bi = B + i * n;
        memset(Ti, 0, (size_t)i * sizeof(double));
        Ti[i] = 1.0;
        for (Py_ssize_t j = 0; j <= i; j++) {
            Bi[j] = sc * R[j * n + i];
        }
    }
    /* One Householder reflection per column, from the last; v holds its bottom part. */
    Work wv, ws;
    wv.p = ws.p = NULL;
    double *v = work_get(&wv, n), *s = v == NULL ? NULL : work_get(&ws, n);
    if (s == NULL) {
        work_free(&wv);
        if (work != stack) {
            PyMem_Free(work);
        }
        return -1;
    }
    for (Py_ssize_t k = n - 1; k >= 0; k--) {
        double *Tk = T + k * n;
        double a = Tk[k], scale = 1.0, sigma = 0.0;
        for (Py_ssize_t i = k; i < n; i++) {
            double b = B[i * n + k];
            v[i] = b;
            sigma += b * b;
        }
        if (sigma == 0.0) {
            continue;
        }
        if (!(sigma < 1e300)) {
            /* the top entry is >= 1, so only overflow (or a nan) needs the scaled sum */
            double m = a;
            for (Py_ssize_t i = k; i < n; i++) {
                double b = fabs(v[i]);
                m = b > m ? b : m;
            }
            scale = 1.0 / m;
            sigma = 0.0;
            for (Py_ssize_t i = k; i < n; i++) {
                v[i] *= scale;
                sigma += v[i] * v[i];
            }
        }
        a *= scale;
        double beta = sqrt(a * a + sigma);
        /* v0 = a - beta without cancellation (a > 0); H = I - tau [v0; v][v0; v]^T */
        double v0 = -sigma / (a + beta);
        double tau = -1.0 / (beta * v0);
        Tk[k] = beta / scale;
        /* top row k is still e_k here, so it adds nothing to s below column k */
        memset(s, 0, (size_t)k * sizeof(double));
        for (Py_ssize_t i = k; i < n; i += 4) {
            int m = n - i < 4 ? (int)(n - i) : 4;
            const double *rows[4] = {B + i * n, B + (i + 1) * n, B + (i + 2) * n,
                                     B + (i + 3) * n};
            acc_rows(s, rows, v + i, m, k);
        }
        double f = tau * v0;
        for (Py_ssize_t j = 0; j < k; j++) {
            Tk[j] = -f * s[j];
        }
        for (Py_ssize_t i = k; i < n; i += 4) {
            int m = n - i < 4 ? (int)(n - i) : 4;
            double *rows[4] = {B + i * n, B + (i + 1) * n, B + (i + 2) * n, B + (i + 3) * n};
            double g[4];
            for (int q = 0; q < m; q++) {
                g[q] = tau * v[i + q];
                rows[q][k] = 0.0;
            }
            sub_rows(rows, s, g, m, k);
        }
    }
    /* back substitution U^T X = [R | z], row by row from the last, in place */
    for (Py_ssize_t i = n - 1; i >= 0; i--) {
        double *Ri = R + i * n;
        double zi = z[i];
        Py_ssize_t l = i + 1;
        for (; l + 3 < n; l += 4) {
            const double *rows[4] = {R + l * n, R + (l + 1) * n, R + (l + 2) * n,
                                     R + (l + 3) * n};
            double u[4] = {T[l * n + i], T[(l + 1) * n + i], T[(l + 2) * n + i],
                           T[(l + 3) * n + i]};
            sub_staggered(Ri, rows, u, l, n);
            zi -= (u[0] * z[l] + u[1] * z[l + 1]) + (u[2] * z[l + 2] + u[3] * z[l + 3]);
        }
        for (; l < n; l++) {
            double u = T[l * n + i];
            const double *Rl = R + l * n;
            for (Py_ssize_t j = l; j < n; j++) {
                Ri[j] -= u * Rl[j];
            }
            zi -= u * z[l];
        }
        double d = T[i * n + i];
        for (Py_ssize_t j = i; j < n; j++) {
            Ri[j] /= d;
        }
        z[i] = zi / d;
    }
    for (Py_ssize_t i = 0; i < n; i++) {
        double *Ri = R + i * n;
        if (Ri[i] < 0.0) {
            for (Py_ssize_t j = i; j < n; j++) {
                Ri[j] = -Ri[j];
            }
            z[i] = -z[i];
        }
    }
    work_free(&wv);
    work_free(&ws);
    if (work != stack) {
        PyMem_Free(work);
    }
    return 0;
}

/*
 * SRIF time update for independent random walks of the weights, covariance increment
 * diag(c) with c_j = s q_j (recursive/_givens.py term_drift is the reference).
 *
 * Lambda' = Lambda (I + C Lambda)^{-1}; diag(c) is a sum of the rank-one terms
 * c_j e_j e_j^T and covariance increments add, so each weight with c_j > 0 is done in
 * turn: Lambda' = R^T (I + a a^T)^{-1} R with a = sqrt(c) r, r = R e_j.  As in
 * random_walk, R' = U^{-T} R with U^T U = I + a a^T, but U is known in closed form (the
 * Cholesky factor of a rank-one change of I, in reverse order), so the back substitution
 * needs one running row S: with E_i = 1 + c sum_{k >= i} r_k^2, from the last row with
 * r_i != 0 up, Y = R_i - r_i S, R'_i = sqrt(E_{i+1} / E_i) Y, S += (c r_i / E_i) Y.
 * About 4 j n flops for weight j (one row scaling for j = 0).  For c > 1 the E_i are
 * divided by c (rho = 1, E starts at 1/c), which keeps the ratios and makes an overflowed
 * c = inf the exact limit: everything known about w_j is forgotten.
 */
static void
drift_one(double *R, double *z, double *S, Py_ssize_t n, Py_ssize_t j, double c)
{
    Py_ssize_t p = j;
    while (p >= 0 && R[p * n + j] == 0.0) {
        p--;
    }
    if (p < 0) {
        return;  /* nothing is known about w_j */
    }
    double rho = c, e = 1.0;
    if (c > 1.0) {
        rho = 1.0;
        e = 1.0 / c;
    }
    memset(S, 0, (size_t)n * sizeof(double));
    double sz = 0.0;
    for (Py_ssize_t i = p; i >= 0; i--) {
        double *Ri = R + i * n;
        double r = Ri[j];
        if (r == 0.0) {
            continue;  /* the row is unchanged */
        }
        double e_new = e + rho * r * r;
        double f = sqrt(e / e_new), g = rho * r / e_new;
        for (Py_ssize_t k = i; k < n; k++) {
            double y = Ri[k] - r * S[k];
            S[k] += g * y;
            Ri[k] = f * y;
        }
        double yz = z[i] - r * sz;
        sz += g * yz;
        z[i] = f * yz;
        e = e_new;
    }
    for (Py_ssize_t i = 0; i <= p; i++) {
        double *Ri = R + i * n;
        if (Ri[i] < 0.0) {
            for (Py_ssize_t k = i; k < n; k++) {
                Ri[k] = -Ri[k];
            }
            z[i] = -z[i];
        }
    }
}

/* ------------------------------------------------------------------ module functions */

PyDoc_STRVAR(update_doc,
"update($module, R, z, phi, y, /)\n--\n\n"
"Rotate the row [phi^T, y] into the triangular [R | z] in place; return e.\n\n"
"Afterwards [R z; 0 e] = Q^T [R0 z0; phi^T y] with Q orthogonal (det Q = 1), so\n"
"R^T R gains phi phi^T, R^T z gains phi y, and e = (y - phi^T m) / sqrt(1 + phi^T V phi)\n"
"when R0 has a positive diagonal. phi is clobbered (left as zeros).");

static PyObject *
kernel_update(PyObject *self, PyObject *const *args, Py_ssize_t nargs)
{
    static const char *const names[] = {"z", "R", "phi"};
    Buffers b = {.count = 0};
    double y, *R, *z, *phi;
    if (check_nargs("update", nargs, 4) < 0 || get_double(args[3], "y", &y) < 0) {
        return NULL;
    }
    if ((z = get_array(&b, args[1], "z", 1, -1, 1)) == NULL) {
        return NULL;
    }
    Py_ssize_t n = b.view[0].shape[0];
    if (check_n(n) < 0 || (R = get_array(&b, args[0], "R", 2, n, 1)) == NULL ||
        (phi = get_array(&b, args[2], "phi", 1, n, 1)) == NULL ||
        check_disjoint(&b, names, 3) < 0) {
        release_all(&b);
        return NULL;
    }
    double e = rotate_in(R, z, phi, y, n, 0);
    release_all(&b);
    return PyFloat_FromDouble(e);
}

PyDoc_STRVAR(stabilize_doc,
"stabilize($module, R, z, r0, z0, delta, /)\n--\n\n"
"Replace [R | z] in place by the triangular factor of\n"
"[sqrt(delta) R, sqrt(delta) z; sqrt(1-delta) diag(r0), sqrt(1-delta) z0],\n"
"so that R^T R = delta R^T R + (1-delta) diag(r0^2). 0 <= delta <= 1.");

static PyObject *
kernel_stabilize(PyObject *self, PyObject *const *args, Py_ssize_t nargs)
{
    static const char *const names[] = {"z", "R", "r0", "z0"};
    Buffers b = {.count = 0};
    double delta, *R, *z, *r0, *z0;
    if (check_nargs("stabilize", nargs, 5) < 0 || get_double(args[4], "delta", &delta) < 0) {
        return NULL;
    }
    if (!(delta >= 0.0 && delta <= 1.0)) {
        PyErr_Format(PyExc_ValueError, "delta must be in [0, 1], got %R", args[4]);
        return NULL;
    }
    if ((z = get_array(&b, args[1], "z", 1, -1, 1)) == NULL) {
        return NULL;
    }
    Py_ssize_t n = b.view[0].shape[0];
    if (check_n(n) < 0 || (R = get_array(&b, args[0], "R", 2, n, 1)) == NULL ||
        (r0 = get_array(&b, args[2], "r0", 1, n, 0)) == NULL ||
        (z0 = get_array(&b, args[3], "z0", 1, n, 0)) == NULL ||
        check_disjoint(&b, names, 2) < 0) {
        release_all(&b);
        return NULL;
    }
    Work ww;
    double sd = sqrt(delta), sc = sqrt(1.0 - delta), *w = work_get(&ww, n);
    if (w == NULL) {
        release_all(&b);
        return NULL;
    }
    if (sd != 1.0) {
        for (Py_ssize_t i = 0; i < n; i++) {
            for (Py_ssize_t j = i; j < n; j++) {
                R[i * n + j] *= sd;
            }
            z[i] *= sd;
        }
    }
    /* Prior row i is sqrt(1-delta) [r0_i e_i, z0_i]: zero before column i. */
    for (Py_ssize_t i = 0; i < n; i++) {
        double d = sc * r0[i];
        if (d == 0.0) {
            /* No information in this row; its z0 part would only be residual. */
            continue;
        }
        memset(w + i, 0, (size_t)(n - i) * sizeof(double));
        w[i] = d;
        rotate_in(R, z, w, sc * z0[i], n, i);
    }
    work_free(&ww);
    release_all(&b);
    Py_RETURN_NONE;
}

PyDoc_STRVAR(random_walk_doc,
"random_walk($module, R, z, c, /)\n--\n\n"
"Square-root information time update for weights w <- w + noise, cov(noise) = c I.\n\n"
"In place: R^T R becomes Lambda (I + c Lambda)^{-1} (= (Lambda^{-1} + c I)^{-1} when\n"
"Lambda = R^T R is invertible) and the mean R^{-1} z is unchanged. Works for a singular R.\n"
"c must be positive and finite.");

static PyObject *
kernel_random_walk(PyObject *self, PyObject *const *args, Py_ssize_t nargs)
{
    static const char *const names[] = {"z", "R"};
    Buffers b = {.count = 0};
    double c, *R, *z;
    if (check_nargs("random_walk", nargs, 3) < 0 || get_double(args[2], "c", &c) < 0) {
        return NULL;
    }
    if (!(c > 0.0 && c <= DBL_MAX)) {
        PyErr_Format(PyExc_ValueError, "c must be positive and finite, got %R", args[2]);
        return NULL;
    }
    if ((z = get_array(&b, args[1], "z", 1, -1, 1)) == NULL) {
        return NULL;
    }
    Py_ssize_t n = b.view[0].shape[0];
    if (check_n(n) < 0 || (R = get_array(&b, args[0], "R", 2, n, 1)) == NULL ||
        check_disjoint(&b, names, 2) < 0) {
        release_all(&b);
        return NULL;
    }
    int rc = random_walk_impl(R, z, n, c);
    release_all(&b);
    if (rc < 0) {
        return NULL;
    }
    Py_RETURN_NONE;
}

PyDoc_STRVAR(term_drift_doc,
"term_drift($module, R, z, q, s, /)\n--\n\n"
"Square-root information time update for weights w_j <- w_j + noise_j, independent,\n"
"var(noise_j) = s * q_j.\n\n"
"In place: R^T R becomes Lambda (I + C Lambda)^{-1}, C = diag(s q), and the mean R^{-1} z\n"
"is unchanged. Works for a singular R. q (n entries) and s must be non-negative and\n"
"finite; a product s * q_j that overflows forgets everything known about w_j.");

static PyObject *
kernel_term_drift(PyObject *self, PyObject *const *args, Py_ssize_t nargs)
{
    static const char *const names[] = {"z", "R", "q"};
    Buffers b = {.count = 0};
    double s, *R, *z, *q;
    if (check_nargs("term_drift", nargs, 4) < 0 || get_double(args[3], "s", &s) < 0) {
        return NULL;
    }
    if (!(s >= 0.0 && s <= DBL_MAX)) {
        PyErr_Format(PyExc_ValueError, "s must be non-negative and finite, got %R", args[3]);
        return NULL;
    }
    if ((z = get_array(&b, args[1], "z", 1, -1, 1)) == NULL) {
        return NULL;
    }
    Py_ssize_t n = b.view[0].shape[0];
    if (check_n(n) < 0 || (R = get_array(&b, args[0], "R", 2, n, 1)) == NULL ||
        (q = get_array(&b, args[2], "q", 1, n, 0)) == NULL || check_disjoint(&b, names, 2) < 0) {
        release_all(&b);
        return NULL;
    }
    for (Py_ssize_t j = 0; j < n; j++) {
        if (!(q[j] >= 0.0 && q[j] <= DBL_MAX)) {
            PyObject *v = PyFloat_FromDouble(q[j]);
            if (v != NULL) {
                PyErr_Format(PyExc_ValueError, "q must be non-negative and finite, got q[%zd] = %R",
                             j, v);
                Py_DECREF(v);
            }
            release_all(&b);
            return NULL;
        }
    }
    Work wS;
    double *S = work_get(&wS, n);
    if (S == NULL) {
        release_all(&b);
        return NULL;
    }
    for (Py_ssize_t j = 0; j < n; j++) {
        double c = s * q[j];
        if (c != 0.0) {
            drift_one(R, z, S, n, j, c);
        }
    }
    work_free(&wS);
    release_all(&b);
    Py_RETURN_NONE;
}

/*
 * Row j of stabilized_rows into out (3, k): the mean, the leverage and delta of one row p
 * under one model's pencil.  The one loop both entry points run, so a row's bits do not
 * depend on which of them computed it.
 */
static inline void
stabilized_row(double *out, Py_ssize_t k, Py_ssize_t j, const double *M, const double *kappa,
               const double *c0, const double *dc, const double *p, Py_ssize_t n, double dt,
               double h)
{
    double d = exp2(-dt / h), m = 0.0, l = 0.0;
    for (Py_ssize_t i = 0; i < n; i++) {
        const double *Mi = M + i * n;
        double g = 0.0;
        for (Py_ssize_t c = 0; c < n; c++) {
            g += Mi[c] * p[c];
        }
        /* a row with no component in a direction owes nothing to it, even to one whose
         * q is 0 (0/0 would make the row look unidentified) */
        double gi = g == 0.0 ? 0.0 : g / (kappa[i] + (1.0 - kappa[i]) * d);
        l += g * gi;
        m += gi * (c0[i] + dc[i] * d);
    }
    out[j] = m;
    out[k + j] = l;
    out[2 * k + j] = d;
}

PyDoc_STRVAR(stabilized_rows_doc,
"stabilized_rows($module, out, M, kappa, c0, dc, P, dt, half_life, /)\n--\n\n"
"Per-row predictive mean and leverage under stabilized forgetting, for a batch.\n\n"
"For row j of P (k x n) with delta_j = 2**(-dt_j / half_life) and g = M P_j:\n"
"out[0, j] = sum_i g_i (c0_i + dc_i delta_j) / q_i, out[1, j] = sum_i g_i^2 / q_i and\n"
"out[2, j] = delta_j, where q_i = kappa_i + (1 - kappa_i) delta_j.  out is (3, k); M is\n"
"(n, n); kappa, c0, dc have n entries and dt has k.  A term with g_i = 0 adds nothing\n"
"(even where q_i = 0); a q_i of 0 otherwise gives an infinite leverage.");

static PyObject *
kernel_stabilized_rows(PyObject *self, PyObject *const *args, Py_ssize_t nargs)
{
    static const char *const names[] = {"out", "kappa", "M", "c0", "dc", "P", "dt"};
    Buffers b = {.count = 0};
    double h, *out, *M, *kappa, *c0, *dc, *P, *dt;
    if (check_nargs("stabilized_rows", nargs, 8) < 0 ||
        get_double(args[7], "half_life", &h) < 0) {
        return NULL;
    }
    if (!(h > 0.0 && h <= DBL_MAX)) {
        PyErr_Format(PyExc_ValueError, "half_life must be positive and finite, got %R",
                     args[7]);
        return NULL;
    }
    if ((out = get_array(&b, args[0], "out", 2, -2, 1)) == NULL) {
        return NULL;
    }
    Py_ssize_t k = b.view[0].shape[1];
    if (b.view[0].shape[0] != 3) {
        PyErr_Format(PyExc_ValueError, "out must have shape (3, k), got (%zd, %zd)",
                     b.view[0].shape[0], k);
        release_all(&b);
        return NULL;
    }
    if ((kappa = get_array(&b, args[2], "kappa", 1, -1, 0)) == NULL) {
        release_all(&b);
        return NULL;
    }
    Py_ssize_t n = b.view[1].shape[0];
    if (check_n(n) < 0 || (M = get_matrix(&b, args[1], "M", n, n, 0)) == NULL ||
        (c0 = get_array(&b, args[3], "c0", 1, n, 0)) == NULL ||
        (dc = get_array(&b, args[4], "dc", 1, n, 0)) == NULL ||
        (P = get_matrix(&b, args[5], "P", k, n, 0)) == NULL ||
        (dt = get_array(&b, args[6], "dt", 1, k, 0)) == NULL ||
        check_disjoint(&b, names, 1) < 0) {
        release_all(&b);
        return NULL;
    }
    for (Py_ssize_t j = 0; j < k; j++) {
        stabilized_row(out, k, j, M, kappa, c0, dc, P + j * n, n, dt[j], h);
    }
    release_all(&b);
    Py_RETURN_NONE;
}

PyDoc_STRVAR(stabilized_rows_many_doc,
"stabilized_rows_many($module, out, M, kappa, c0, dc, half_life, P, dt, owner, /)\n--\n\n"
"stabilized_rows for the rows of several models of n terms at once.\n\n"
"Row j belongs to model g = owner[j] (a float64 holding an integer in 0..G-1) and gets\n"
"exactly what stabilized_rows(out_j, M[g], kappa[g], c0[g], dc[g], P_j, dt_j,\n"
"half_life[g]) gives it (the same operations in the same order).  M is (G n, n): the\n"
"models' (n, n) matrices one below the other; kappa, c0, dc are (G, n); half_life is (G,),\n"
"each positive and finite; P is (k, n), dt and owner are (k,), out is (3, k).");

static PyObject *
kernel_stabilized_rows_many(PyObject *self, PyObject *const *args, Py_ssize_t nargs)
{
    static const char *const names[] = {"out", "kappa", "M", "c0", "dc", "half_life", "P",
                                        "dt", "owner"};
    Buffers b = {.count = 0};
    double *out, *M, *kappa, *c0, *dc, *hl, *P, *dt, *owner;
    if (check_nargs("stabilized_rows_many", nargs, 9) < 0) {
        return NULL;
    }
    if ((out = get_array(&b, args[0], "out", 2, -2, 1)) == NULL) {
        return NULL;
    }
    Py_ssize_t k = b.view[0].shape[1];
    if (b.view[0].shape[0] != 3) {
        PyErr_Format(PyExc_ValueError, "out must have shape (3, k), got (%zd, %zd)",
                     b.view[0].shape[0], k);
        release_all(&b);
        return NULL;
    }
    if ((kappa = get_array(&b, args[2], "kappa", 2, -2, 0)) == NULL) {
        release_all(&b);
        return NULL;
    }
    Py_ssize_t G = b.view[1].shape[0], n = b.view[1].shape[1];
    if (check_n(n) < 0 || (M = get_matrix(&b, args[1], "M", G * n, n, 0)) == NULL ||
        (c0 = get_matrix(&b, args[3], "c0", G, n, 0)) == NULL ||
        (dc = get_matrix(&b, args[4], "dc", G, n, 0)) == NULL ||
        (hl = get_array(&b, args[5], "half_life", 1, G, 0)) == NULL ||
        (P = get_matrix(&b, args[6], "P", k, n, 0)) == NULL ||
        (dt = get_array(&b, args[7], "dt", 1, k, 0)) == NULL ||
        (owner = get_array(&b, args[8], "owner", 1, k, 0)) == NULL ||
        check_disjoint(&b, names, 1) < 0) {
        release_all(&b);
        return NULL;
    }
    for (Py_ssize_t g = 0; g < G; g++) {
        if (!(hl[g] > 0.0 && hl[g] <= DBL_MAX)) {
            PyErr_Format(PyExc_ValueError, "half_life[%zd] must be positive and finite", g);
            release_all(&b);
            return NULL;
        }
    }
    for (Py_ssize_t j = 0; j < k; j++) {
        double o = owner[j];
        if (!(o >= 0.0 && o < (double)G && o == floor(o))) {
            PyErr_Format(PyExc_ValueError, "owner[%zd] must be an integer in 0..%zd",
                         j, G - 1);
            release_all(&b);
            return NULL;
        }
    }
    for (Py_ssize_t j = 0; j < k; j++) {
        Py_ssize_t g = (Py_ssize_t)owner[j];
        stabilized_row(out, k, j, M + g * n * n, kappa + g * n, c0 + g * n, dc + g * n,
                       P + j * n, n, dt[j], hl[g]);
    }
    release_all(&b);
    Py_RETURN_NONE;
}

PyDoc_STRVAR(predict_doc,
"predict($module, R, z, phi, /)\n--\n\n"
"Return (mean, lev) = (u.z, u.u) with u = R^{-T} phi; nothing is modified.\n\n"
"mean = phi^T m and lev = phi^T V phi. If a diagonal entry of R is exactly 0 the\n"
"weights are not identified and (nan, nan) is returned.");

static PyObject *
kernel_predict(PyObject *self, PyObject *const *args, Py_ssize_t nargs)
{
    Buffers b = {.count = 0};
    double *R, *z, *phi, *u;
    Work wu;
    if (check_nargs("predict", nargs, 3) < 0) {
        return NULL;
    }
    if ((z = get_array(&b, args[1], "z", 1, -1, 0)) == NULL) {
        return NULL;
    }
    Py_ssize_t n = b.view[0].shape[0];
    if (check_n(n) < 0 || (R = get_array(&b, args[0], "R", 2, n, 0)) == NULL ||
        (phi = get_array(&b, args[2], "phi", 1, n, 0)) == NULL ||
        (u = work_get(&wu, n)) == NULL) {
        release_all(&b);
        return NULL;
    }
    /* Forward substitution R^T u = phi, row by row of R so memory is read in order:
     * once u_i is known, its contribution R_ij u_i is removed from every later u_j. */
    double mean = 0.0, lev = 0.0;
    memcpy(u, phi, (size_t)n * sizeof(double));
    for (Py_ssize_t i = 0; i < n; i++) {
        const double *Ri = R + i * n;
        if (Ri[i] == 0.0) {
            mean = lev = Py_NAN;
            break;
        }
        double ui = u[i] / Ri[i];
        mean += ui * z[i];
        lev += ui * ui;
        for (Py_ssize_t j = i + 1; j < n; j++) {
            u[j] -= Ri[j] * ui;
        }
    }
    work_free(&wu);
    release_all(&b);
    return Py_BuildValue("(dd)", mean, lev);
}

PyDoc_STRVAR(solve_upper_doc,
"solve_upper($module, R, b, /)\n--\n\n"
"b <- R^{-1} b in place (back substitution).\n\n"
"Raises ZeroDivisionError, leaving b unchanged, if a diagonal entry of R is exactly 0.");

static PyObject *
kernel_solve_upper(PyObject *self, PyObject *const *args, Py_ssize_t nargs)
{
    static const char *const names[] = {"b", "R"};
    Buffers bufs = {.count = 0};
    double *R, *x;
    if (check_nargs("solve_upper", nargs, 2) < 0) {
        return NULL;
    }
    if ((x = get_array(&bufs, args[1], "b", 1, -1, 1)) == NULL) {
        return NULL;
    }
    Py_ssize_t n = bufs.view[0].shape[0];
    if (check_n(n) < 0 || (R = get_array(&bufs, args[0], "R", 2, n, 0)) == NULL ||
        check_disjoint(&bufs, names, 1) < 0) {
        release_all(&bufs);
        return NULL;
    }
    for (Py_ssize_t i = 0; i < n; i++) {
        if (R[i * n + i] == 0.0) {
            release_all(&bufs);
            PyErr_Format(PyExc_ZeroDivisionError, "R is singular: R[%zd, %zd] == 0", i, i);
            return NULL;
        }
    }
    for (Py_ssize_t i = n - 1; i >= 0; i--) {
        const double *Ri = R + i * n;
        double s = x[i];
        for (Py_ssize_t j = i + 1; j < n; j++) {
            s -= Ri[j] * x[j];
        }
        x[i] = s / Ri[i];
    }
    release_all(&bufs);
    Py_RETURN_NONE;
}

PyDoc_STRVAR(rank_ratio_doc,
"rank_ratio($module, R, /)\n--\n\n"
"min over columns i of |R_ii| / ||R[:i+1, i]|| (0/0 counts as 0; 1.0 when n = 0).\n\n"
"The part of column i not explained by the columns before it, relative to the column's\n"
"own size: a scale-invariant rank test. nan if the triangle holds a nan.");

static PyObject *
kernel_rank_ratio(PyObject *self, PyObject *arg)
{
    Buffers b = {.count = 0};
    const double *R;
    if ((R = get_array(&b, arg, "R", 2, -1, 0)) == NULL) {
        return NULL;
    }
    Py_ssize_t n = b.view[0].shape[0];
    if (check_n(n) < 0) {
        release_all(&b);
        return NULL;
    }
    double best = 1.0;
    for (Py_ssize_t i = 0; i < n; i++) {
        /* Scale by the largest entry so the sum of squares cannot overflow or underflow. */
        double big = 0.0, ratio;
        for (Py_ssize_t k = 0; k <= i; k++) {
            double a = fabs(R[k * n + i]);
            if (a > big || isnan(a)) {
                big = a;
            }
        }
        if (big == 0.0) {
            ratio = 0.0;
        }
        else {
            double ss = 0.0;
            for (Py_ssize_t k = 0; k <= i; k++) {
                double a = R[k * n + i] / big;
                ss += a * a;
            }
            ratio = fabs(R[i * n + i]) / big / sqrt(ss);
        }
        if (isnan(ratio)) {
            best = Py_NAN;
            break;
        }
        if (ratio < best) {
            best = ratio;
        }
    }
    release_all(&b);
    return PyFloat_FromDouble(best);
}

/* Read a list or tuple of n numbers into d; -1 with an exception set on failure. */
static int
read_row(PyObject *x, Py_ssize_t n, double *d)
{
    if (!PyList_Check(x) && !PyTuple_Check(x)) {
        PyErr_Format(PyExc_TypeError, "x must be a list or tuple of numbers, got %.100s",
                     Py_TYPE(x)->tp_name);
        return -1;
    }
    if (PySequence_Fast_GET_SIZE(x) != n) {
        PyErr_Format(PyExc_ValueError, "x must have %zd values, got %zd", n,
                     PySequence_Fast_GET_SIZE(x));
        return -1;
    }
    PyObject **items = PySequence_Fast_ITEMS(x);
    for (Py_ssize_t j = 0; j < n; j++) {
        double v = PyFloat_CheckExact(items[j]) ? PyFloat_AS_DOUBLE(items[j])
                                                : PyFloat_AsDouble(items[j]);
        if (v == -1.0 && PyErr_Occurred()) {
            return -1;
        }
        d[j] = v;
    }
    return 0;
}

/*
 * ||M d|| for the differences d (n of them): sqrt(sum_i y_i^2), y_i = sum_{j < end_i} M[i, j]
 * d_j, with end_i = n, or i + 1 when `lower` (the zeros of a lower-triangular M left out).
 * Each product and sum is rounded on its own (volatile: never one fused multiply-add), in
 * index order, as the elementwise array expression computes them.
 */
static double
whiten_row(const double *d, const double *M, Py_ssize_t n, int lower)
{
    double acc = 0.0;
    for (Py_ssize_t i = 0; i < n; i++) {
        const double *Mi = M + i * n;
        double y = d[0] * Mi[0];
        Py_ssize_t end = lower ? i + 1 : n;
        for (Py_ssize_t j = 1; j < end; j++) {
            volatile double p = d[j] * Mi[j];
            y = y + p;
        }
        volatile double q = y * y;
        acc = i == 0 ? q : acc + q;
    }
    return n == 0 ? 0.0 : sqrt(acc);
}

PyDoc_STRVAR(whiten_norm_doc,
"whiten_norm($module, x, mean, M, /)\n--\n\n"
"||M (x - mean)||: sqrt(sum_i y_i^2) with y_i = sum_j M[i, j] (x_j - mean_j).\n\n"
"x is a list or tuple of n numbers, mean an (n,) and M an (n, n) float64 array. Every\n"
"sum is taken in index order over all of j (zeros of a triangular M included), as the\n"
"elementwise array expression does, so that a row's value has the same bits either way.");

static PyObject *
kernel_whiten_norm(PyObject *self, PyObject *const *args, Py_ssize_t nargs)
{
    Buffers b = {.count = 0};
    const double *mean, *M;
    Work wd;
    if (check_nargs("whiten_norm", nargs, 3) < 0) {
        return NULL;
    }
    if ((mean = get_array(&b, args[1], "mean", 1, -1, 0)) == NULL) {
        return NULL;
    }
    Py_ssize_t n = b.view[0].shape[0];
    if (check_n(n) < 0 || (M = get_array(&b, args[2], "M", 2, n, 0)) == NULL) {
        release_all(&b);
        return NULL;
    }
    double *d = work_get(&wd, n);
    if (d == NULL || read_row(args[0], n, d) < 0) {
        work_free(&wd);
        release_all(&b);
        return NULL;
    }
    for (Py_ssize_t j = 0; j < n; j++) {
        d[j] -= mean[j];
    }
    double norm = whiten_row(d, M, n, 0);
    work_free(&wd);
    release_all(&b);
    return PyFloat_FromDouble(norm);
}

PyDoc_STRVAR(scaled_row_doc,
"scaled_row($module, out, x, lo, hi, width, /)\n--\n\n"
"out[0, 0] = 1 and out[0, 1 + j] = ((x_j - lo_j) - (hi_j - x_j)) / width_j.\n\n"
"The terms of an affine basis on inputs scaled to [-1, 1]: x a list or tuple of n\n"
"numbers, lo, hi and width (n,) float64 arrays, out a writable (1, n + 1) float64 array.\n"
"Each operation is rounded on its own, as the array expression does (same bits).");

static PyObject *
kernel_scaled_row(PyObject *self, PyObject *const *args, Py_ssize_t nargs)
{
    Buffers b = {.count = 0};
    double *out;
    const double *lo, *hi, *w;
    Work wd;
    if (check_nargs("scaled_row", nargs, 5) < 0) {
        return NULL;
    }
    if ((lo = get_array(&b, args[2], "lo", 1, -1, 0)) == NULL) {
        return NULL;
    }
    Py_ssize_t n = b.view[0].shape[0];
    if (check_n(n) < 0 || (hi = get_array(&b, args[3], "hi", 1, n, 0)) == NULL ||
        (w = get_array(&b, args[4], "width", 1, n, 0)) == NULL ||
        (out = get_matrix(&b, args[0], "out", 1, n + 1, 1)) == NULL) {
        release_all(&b);
        return NULL;
    }
    double *d = work_get(&wd, n);
    if (d == NULL || read_row(args[1], n, d) < 0) {
        work_free(&wd);
        release_all(&b);
        return NULL;
    }
    out[0] = 1.0;
    for (Py_ssize_t j = 0; j < n; j++) {
        out[1 + j] = ((d[j] - lo[j]) - (hi[j] - d[j])) / w[j];
    }
    work_free(&wd);
    release_all(&b);
    Py_RETURN_NONE;
}

PyDoc_STRVAR(outside_doc,
"outside($module, x, lo, hi, /)\n--\n\n"
"True if some x_j < lo_j or x_j > hi_j (a nan is in range: it compares false with both).\n\n"
"x is a list or tuple of n numbers, lo and hi (n,) float64 arrays.");

static PyObject *
kernel_outside(PyObject *self, PyObject *const *args, Py_ssize_t nargs)
{
    Buffers b = {.count = 0};
    const double *lo, *hi;
    Work wd;
    if (check_nargs("outside", nargs, 3) < 0) {
        return NULL;
    }
    if ((lo = get_array(&b, args[1], "lo", 1, -1, 0)) == NULL) {
        return NULL;
    }
    Py_ssize_t n = b.view[0].shape[0];
    if (check_n(n) < 0 || (hi = get_array(&b, args[2], "hi", 1, n, 0)) == NULL) {
        release_all(&b);
        return NULL;
    }
    double *d = work_get(&wd, n);
    if (d == NULL || read_row(args[0], n, d) < 0) {
        work_free(&wd);
        release_all(&b);
        return NULL;
    }
    int flag = 0;
    for (Py_ssize_t j = 0; j < n && !flag; j++) {
        flag = d[j] < lo[j] || d[j] > hi[j];
    }
    work_free(&wd);
    release_all(&b);
    return PyBool_FromLong(flag);
}

/*
 * For a kernel writing one value per row of X: the (k,) output, acquired first as
 * b->view[0], must have as many entries as X (b->view[x]) has rows, and share no memory
 * with the inputs. On failure everything is released, an exception set and -1 returned.
 */
static int
check_row_output(Buffers *b, int x, const char *const *names)
{
    Py_ssize_t k = b->view[x].shape[0];
    if (b->view[0].shape[0] != k) {
        PyErr_Format(PyExc_ValueError, "out must have shape (%zd,), got (%zd,)", k,
                     b->view[0].shape[0]);
        release_all(b);
        return -1;
    }
    if (check_disjoint(b, names, 1) < 0) {
        release_all(b);
        return -1;
    }
    return 0;
}

PyDoc_STRVAR(whiten_norms_doc,
"whiten_norms($module, out, X, mean, M, /)\n--\n\n"
"out[r] = whiten_norm(X[r], mean, M) for every row r of the (k, n) float64 array X.\n\n"
"The same operations in the same order as whiten_norm (and as the elementwise array\n"
"expression), row by row: a row's value does not depend on the other rows. out is a\n"
"writable (k,) float64 array.");

static PyObject *
kernel_whiten_norms(PyObject *self, PyObject *const *args, Py_ssize_t nargs)
{
    Buffers b = {.count = 0};
    double *out;
    const double *X, *mean, *M;
    Work wd;
    if (check_nargs("whiten_norms", nargs, 4) < 0) {
        return NULL;
    }
    /* out first: check_disjoint checks the buffers written, which come first */
    if ((out = get_array(&b, args[0], "out", 1, -1, 1)) == NULL) {
        return NULL;
    }
    if ((mean = get_array(&b, args[2], "mean", 1, -1, 0)) == NULL) {
        release_all(&b);
        return NULL;
    }
    Py_ssize_t n = b.view[1].shape[0];
    if (check_n(n) < 0 || (M = get_array(&b, args[3], "M", 2, n, 0)) == NULL ||
        (X = get_matrix(&b, args[1], "X", -1, n, 0)) == NULL) {
        release_all(&b);
        return NULL;
    }
    static const char *const names[] = {"out", "mean", "M", "X"};
    if (check_row_output(&b, 3, names) < 0) {
        return NULL;
    }
    Py_ssize_t k = b.view[3].shape[0];
    double *d = work_get(&wd, n);
    if (d == NULL) {
        release_all(&b);
        return NULL;
    }
    /* a lower-triangular M (the inverse of a Cholesky factor): on a row whose differences
     * are all finite its zeros add signed zeros, which change no square, so they are
     * skipped; a non-finite difference times a zero is nan, so such rows take every term */
    int lower = 1;
    for (Py_ssize_t i = 0; i < n && lower; i++) {
        for (Py_ssize_t j = i + 1; j < n; j++) {
            if (M[i * n + j] != 0.0) {
                lower = 0;
                break;
            }
        }
    }
    for (Py_ssize_t r = 0; r < k; r++) {
        const double *x = X + r * n;
        int finite = 1;
        for (Py_ssize_t j = 0; j < n; j++) {
            d[j] = x[j] - mean[j];
            finite &= isfinite(d[j]) != 0;
        }
        out[r] = whiten_row(d, M, n, lower && finite);
    }
    work_free(&wd);
    release_all(&b);
    Py_RETURN_NONE;
}

PyDoc_STRVAR(scaled_rows_doc,
"scaled_rows($module, out, X, lo, hi, width, /)\n--\n\n"
"scaled_row for every row of the (k, n) float64 array X into the writable (k, n + 1)\n"
"float64 array out: out[r, 0] = 1, out[r, 1 + j] = ((X[r, j] - lo_j) - (hi_j - X[r, j]))\n"
"/ width_j, each operation rounded on its own (the bits of the array expression).");

static PyObject *
kernel_scaled_rows(PyObject *self, PyObject *const *args, Py_ssize_t nargs)
{
    Buffers b = {.count = 0};
    double *out;
    const double *X, *lo, *hi, *w;
    if (check_nargs("scaled_rows", nargs, 5) < 0) {
        return NULL;
    }
    /* out first: check_disjoint checks the buffers written, which come first */
    if ((out = get_array(&b, args[0], "out", 2, -2, 1)) == NULL) {
        return NULL;
    }
    if ((lo = get_array(&b, args[2], "lo", 1, -1, 0)) == NULL) {
        release_all(&b);
        return NULL;
    }
    Py_ssize_t n = b.view[1].shape[0];
    if (check_n(n) < 0 || (hi = get_array(&b, args[3], "hi", 1, n, 0)) == NULL ||
        (w = get_array(&b, args[4], "width", 1, n, 0)) == NULL ||
        (X = get_matrix(&b, args[1], "X", -1, n, 0)) == NULL) {
        release_all(&b);
        return NULL;
    }
    Py_ssize_t k = b.view[4].shape[0];
    if (b.view[0].shape[0] != k || b.view[0].shape[1] != n + 1) {
        PyErr_Format(PyExc_ValueError, "out must have shape (%zd, %zd), got (%zd, %zd)", k,
                     n + 1, b.view[0].shape[0], b.view[0].shape[1]);
        release_all(&b);
        return NULL;
    }
    static const char *const names[] = {"out", "lo", "hi", "width", "X"};
    if (check_disjoint(&b, names, 1) < 0) {
        release_all(&b);
        return NULL;
    }
    for (Py_ssize_t r = 0; r < k; r++) {
        const double *x = X + r * n;
        double *o = out + r * (n + 1);
        o[0] = 1.0;
        for (Py_ssize_t j = 0; j < n; j++) {
            o[1 + j] = ((x[j] - lo[j]) - (hi[j] - x[j])) / w[j];
        }
    }
    release_all(&b);
    Py_RETURN_NONE;
}

PyDoc_STRVAR(outside_rows_doc,
"outside_rows($module, out, X, lo, hi, /)\n--\n\n"
"out[r] = 1.0 if some X[r, j] < lo_j or X[r, j] > hi_j, else 0.0 (a nan is in range).\n\n"
"X is a (k, n) float64 array, lo and hi (n,) float64 arrays, out a writable (k,) float64\n"
"array. Returns the number of rows flagged.");

static PyObject *
kernel_outside_rows(PyObject *self, PyObject *const *args, Py_ssize_t nargs)
{
    Buffers b = {.count = 0};
    double *out;
    const double *X, *lo, *hi;
    if (check_nargs("outside_rows", nargs, 4) < 0) {
        return NULL;
    }
    if ((out = get_array(&b, args[0], "out", 1, -1, 1)) == NULL) {
        return NULL;
    }
    if ((lo = get_array(&b, args[2], "lo", 1, -1, 0)) == NULL) {
        release_all(&b);
        return NULL;
    }
    Py_ssize_t n = b.view[1].shape[0];
    if (check_n(n) < 0 || (hi = get_array(&b, args[3], "hi", 1, n, 0)) == NULL ||
        (X = get_matrix(&b, args[1], "X", -1, n, 0)) == NULL) {
        release_all(&b);
        return NULL;
    }
    static const char *const names[] = {"out", "lo", "hi", "X"};
    if (check_row_output(&b, 3, names) < 0) {
        return NULL;
    }
    Py_ssize_t k = b.view[3].shape[0];
    Py_ssize_t count = 0;
    for (Py_ssize_t r = 0; r < k; r++) {
        const double *x = X + r * n;
        int flag = 0;
        for (Py_ssize_t j = 0; j < n; j++) {
            flag |= (x[j] < lo[j]) | (x[j] > hi[j]);
        }
        out[r] = flag ? 1.0 : 0.0;
        count += flag;
    }
    release_all(&b);
    return PyLong_FromSsize_t(count);
}

static PyMethodDef kernel_methods[] = {
    {"update", (PyCFunction)(void (*)(void))kernel_update, METH_FASTCALL, update_doc},
    {"stabilize", (PyCFunction)(void (*)(void))kernel_stabilize, METH_FASTCALL,
     stabilize_doc},
    {"random_walk", (PyCFunction)(void (*)(void))kernel_random_walk, METH_FASTCALL,
     random_walk_doc},
    {"term_drift", (PyCFunction)(void (*)(void))kernel_term_drift, METH_FASTCALL,
     term_drift_doc},
    {"predict", (PyCFunction)(void (*)(void))kernel_predict, METH_FASTCALL, predict_doc},
    {"solve_upper", (PyCFunction)(void (*)(void))kernel_solve_upper, METH_FASTCALL,
     solve_upper_doc},
    {"rank_ratio", kernel_rank_ratio, METH_O, rank_ratio_doc},
    {"stabilized_rows", (PyCFunction)(void (*)(void))kernel_stabilized_rows, METH_FASTCALL,
     stabilized_rows_doc},
    {"whiten_norm", (PyCFunction)(void (*)(void))kernel_whiten_norm, METH_FASTCALL,
     whiten_norm_doc},
    {"scaled_row", (PyCFunction)(void (*)(void))kernel_scaled_row, METH_FASTCALL,
     scaled_row_doc},
    {"outside", (PyCFunction)(void (*)(void))kernel_outside, METH_FASTCALL, outside_doc},
    {"stabilized_rows_many", (PyCFunction)(void (*)(void))kernel_stabilized_rows_many,
     METH_FASTCALL, stabilized_rows_many_doc},
    {"whiten_norms", (PyCFunction)(void (*)(void))kernel_whiten_norms, METH_FASTCALL,
     whiten_norms_doc},
    {"scaled_rows", (PyCFunction)(void (*)(void))kernel_scaled_rows, METH_FASTCALL,
     scaled_rows_doc},
    {"outside_rows", (PyCFunction)(void (*)(void))kernel_outside_rows, METH_FASTCALL,
     outside_rows_doc},
    {NULL, NULL, 0, NULL},
};

static int
kernel_exec(PyObject *module)
{
    return PyModule_AddIntConstant(module, "MAX_N", MAX_N);
}

static PyModuleDef_Slot kernel_slots[] = {
    {Py_mod_exec, kernel_exec},
    {0, NULL},
};

PyDoc_STRVAR(module_doc,
"Square-root information kernels in C (see recursive._givens for the same API in Python).");

static struct PyModuleDef kernel_module = {
    PyModuleDef_HEAD_INIT,
    .m_name = "recursive._kernel",
    .m_doc = module_doc,
    .m_size = 0,
    .m_methods = kernel_methods,
    .m_slots = kernel_slots,
};

PyMODINIT_FUNC
PyInit__kernel(void)
{
    return PyModuleDef_Init(&kernel_module);
}
