/* The sparse engine's kernels in C: the loops of kernels_numba.py, statement for statement.
 *
 * Why C: numba costs every command-line run about 0.45 s (its import and the loading of the
 * cached kernels) before the first number is computed; this module loads in a millisecond.
 *
 * Same results to the last bit: every loop runs in the same order with the same floating-point
 * operations as the numba kernels (built without -ffast-math and with -ffp-contract=off, so no
 * multiply-add is fused), and where the numba kernels call BLAS/LAPACK (large supernodes) this
 * module calls the same routines, from the same library (SciPy's cython_blas/cython_lapack, as
 * numba does), with the same arguments numba passes.
 *
 * Arrays come in through the buffer protocol (no numpy headers at build time): one-dimensional,
 * C-contiguous, int64 or float64; the Python wrappers in kernels.py allocate the outputs.
 * Every index read from an array is checked before it is used to index another, so malformed
 * input raises ValueError and never reads or writes outside an array.  The inputs must not be
 * changed by another thread during a call (the GIL is released while the loops run).
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <math.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>

typedef int64_t i64;

/* ------------------------------------------------------------------------------------------ */
/* Buffers                                                                                    */

#define MAX_BUFFERS 8

typedef struct {
    Py_buffer views[MAX_BUFFERS];
    int held;
} Buffers;

static void release_all(Buffers *b) {
    for (int i = 0; i < b->held; i++) PyBuffer_Release(&b->views[i]);
    b->held = 0;
}

/* A one-dimensional C-contiguous array of int64 ('i') or float64 ('d'); its length in *len. */
static void *take(Buffers *b, PyObject *obj, char kind, int writable, const char *name,
                  Py_ssize_t *len) {
    Py_buffer *view = &b->views[b->held];
    int flags = PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | (writable ? PyBUF_WRITABLE : 0);
    if (PyObject_GetBuffer(obj, view, flags) < 0) {
        PyErr_Clear();
        PyErr_Format(PyExc_ValueError, "%s: expected a %scontiguous one-dimensional %s array",
                     name, writable ? "writable " : "", kind == 'i' ? "int64" : "float64");
        return NULL;
    }
    b->held++;
    const char *f = view->format ? view->format : "B";
    if (*f == '@' || *f == '=') f++;
#if PY_LITTLE_ENDIAN
    else if (*f == '<') f++;
#endif
    int type_ok = f[0] != '\0' && f[1] == '\0' &&
                  (kind == 'i' ? (f[0] == 'l' || f[0] == 'q') : f[0] == 'd');
    if (view->ndim != 1 || view->itemsize != 8 || !type_ok || view->len != view->shape[0] * 8) {
        PyErr_Format(PyExc_ValueError, "%s: expected a contiguous one-dimensional %s array", name,
                     kind == 'i' ? "int64" : "float64");
        return NULL;
    }
    *len = view->shape[0];
    return view->buf;
}

/* An output must not share memory with an input (it is written while the inputs are read). */
static int overlaps(Buffers *b, int output) {
    if (b->views[output].len == 0) return 0;
    const char *o0 = b->views[output].buf, *o1 = o0 + b->views[output].len;
    for (int i = 0; i < b->held; i++) {
        if (i == output || b->views[i].len == 0) continue;
        const char *i0 = b->views[i].buf, *i1 = i0 + b->views[i].len;
        if (o0 < i1 && i0 < o1) {
            PyErr_SetString(PyExc_ValueError, "an output array overlaps an input array");
            return 1;
        }
    }
    return 0;
}

static int bad(const char *message) {
    PyErr_SetString(PyExc_ValueError, message);
    return -1;
}

/* Scratch memory: a count of 8-byte items, NULL (MemoryError set) when it cannot be had. */
static void *scratch(Py_ssize_t count) {
    if (count < 0 || (size_t)count > (size_t)PY_SSIZE_T_MAX / 8) {
        PyErr_NoMemory();
        return NULL;
    }
    void *p = PyMem_RawCalloc((size_t)(count > 0 ? count : 1), 8);
    if (p == NULL) PyErr_NoMemory();
    return p;
}

/* k*k, -1 when it would not fit (k >= 0). */
static i64 square(i64 k) { return k > 3037000499LL ? -1 : k * k; }

/* A CSR/CSC pointer array: ptr[0] >= 0 (== 0 when from_zero), non-decreasing, last <= limit. */
static int check_pointers(const i64 *ptr, Py_ssize_t len, int from_zero, Py_ssize_t limit,
                          const char *name) {
    if (len < 1) {
        PyErr_Format(PyExc_ValueError, "%s must hold at least one item", name);
        return -1;
    }
    if (ptr[0] < 0 || (from_zero && ptr[0] != 0)) {
        PyErr_Format(PyExc_ValueError, "%s must start at 0", name);
        return -1;
    }
    for (Py_ssize_t i = 1; i < len; i++) {
        if (ptr[i] < ptr[i - 1]) {
            PyErr_Format(PyExc_ValueError, "%s must be non-decreasing", name);
            return -1;
        }
    }
    if (ptr[len - 1] > (i64)limit) {
        PyErr_Format(PyExc_ValueError, "%s points past the end of its array", name);
        return -1;
    }
    return 0;
}

/* The pattern of a unit lower triangular factor: every column starts with its diagonal and
 * holds strictly increasing rows below n; indptr[n] equals the length of indices. */
static int check_factor(const i64 *indptr, Py_ssize_t n, const i64 *indices,
                        Py_ssize_t nnz) {
    if (check_pointers(indptr, n + 1, 1, nnz, "indptr") < 0) return -1;
    if (indptr[n] != (i64)nnz) return bad("indptr must end at the length of indices");
    for (Py_ssize_t j = 0; j < n; j++) {
        i64 p = indptr[j], last = indptr[j + 1];
        if (p == last || indices[p] != (i64)j) {
            return bad("every column of the factor must start with its diagonal");
        }
        for (p = p + 1; p < last; p++) {
            if (indices[p] <= indices[p - 1] || indices[p] >= (i64)n) {
                return bad("row indices must increase within a column and stay below n");
            }
        }
    }
    return 0;
}

/* ------------------------------------------------------------------------------------------ */
/* BLAS and LAPACK: SciPy's, the routines numba's np.dot and np.linalg.inv call               */

typedef void (*dgemm_t)(char *, char *, int *, int *, int *, double *, double *, int *,
                        double *, int *, double *, double *, int *);
typedef void (*dgemv_t)(char *, int *, int *, double *, double *, int *, double *, int *,
                        double *, double *, int *);
typedef double (*ddot_t)(int *, double *, int *, double *, int *);
typedef void (*dgetrf_t)(int *, int *, double *, int *, int *, int *);
typedef void (*dgetri_t)(int *, double *, int *, int *, double *, int *, int *);

static dgemm_t blas_dgemm = NULL;
static dgemv_t blas_dgemv = NULL;
static ddot_t blas_ddot = NULL;
static dgetrf_t lapack_dgetrf = NULL;
static dgetri_t lapack_dgetri = NULL;

/* The function pointer behind scipy.linalg.<module>.__pyx_capi__[name], its signature checked
 * (32-bit Fortran integers, the interface numba is built for). */
static void *cython_function(const char *module, const char *name, const char *signature) {
    void *pointer = NULL;
    PyObject *mod = PyImport_ImportModule(module);
    if (mod == NULL) return NULL;
    PyObject *capi = PyObject_GetAttrString(mod, "__pyx_capi__");
    Py_DECREF(mod);
    if (capi == NULL) return NULL;
    PyObject *capsule = PyMapping_GetItemString(capi, name);
    Py_DECREF(capi);
    if (capsule == NULL) return NULL;
    const char *found = PyCapsule_GetName(capsule);
    if (found == NULL || strncmp(found, signature, strlen(signature)) != 0) {
        PyErr_Format(PyExc_RuntimeError, "%s.%s has an unexpected interface", module, name);
    } else {
        pointer = PyCapsule_GetPointer(capsule, found);
    }
    Py_DECREF(capsule);
    return pointer;
}

static int load_lapack(void) {
    if (lapack_dgetri != NULL) return 0;
    const char *blas = "scipy.linalg.cython_blas", *lapack = "scipy.linalg.cython_lapack";
    void *gemm = cython_function(blas, "dgemm", "void (char *, char *, int *, int *, int *, ");
    void *gemv = gemm ? cython_function(blas, "dgemv", "void (char *, int *, int *, ") : NULL;
    void *dot = gemv ? cython_function(blas, "ddot", "__pyx_t_5scipy_6linalg_11cython_blas_d "
                                                     "(int *, ") : NULL;
    void *getrf = dot ? cython_function(lapack, "dgetrf", "void (int *, int *, ") : NULL;
    void *getri = getrf ? cython_function(lapack, "dgetri", "void (int *, ") : NULL;
    if (getri == NULL) return -1;
    blas_dgemm = (dgemm_t)gemm;
    blas_dgemv = (dgemv_t)gemv;
    blas_ddot = (ddot_t)dot;
    lapack_dgetrf = (dgetrf_t)getrf;
    lapack_dgetri = (dgetri_t)getri;
    return 0;
}

/* numba's np.dot(X, Y) for a C-contiguous Y (k x n) into a C-contiguous out (m x n), BLAS
 * call for BLAS call: a product with a single row or column goes to dgemv (both to ddot),
 * any other to dgemm as the column-major product of the transposes.  x_fortran: X is the
 * transpose of a C array (numba's 'F' layout), whose leading dimension is then m. */
static void numba_dot(const double *x, int x_fortran, const double *y, double *out, i64 m,
                      i64 n, i64 k) {
    double alpha = 1.0, beta = 0.0;
    int one = 1;
    if (k == 0 || m == 0 || n == 0) {
        memset(out, 0, (size_t)(m * n) * sizeof(double));
    } else if (n == 1 && m == 1) {
        int kk = (int)k;
        out[0] = blas_ddot(&kk, (double *)x, &one, (double *)y, &one);
    } else if (n == 1) { /* matrix X times the vector y */
        char trans = x_fortran ? 'n' : 't';
        int mg = x_fortran ? (int)m : (int)k, ng = x_fortran ? (int)k : (int)m;
        int lda = x_fortran ? (int)m : (int)k;
        blas_dgemv(&trans, &mg, &ng, &alpha, (double *)x, &lda, (double *)y, &one, &beta, out,
                   &one);
    } else if (m == 1) { /* the vector x times the matrix Y */
        char trans = 'n';
        int mg = (int)n, ng = (int)k, lda = (int)n;
        blas_dgemv(&trans, &mg, &ng, &alpha, (double *)y, &lda, (double *)x, &one, &beta, out,
                   &one);
    } else {
        char transa = 'n', transb = x_fortran ? 't' : 'n';
        int mm = (int)n, nn = (int)m, kk = (int)k;
        int lda = (int)n, ldb = x_fortran ? (int)m : (int)k, ldc = (int)n;
        blas_dgemm(&transa, &transb, &mm, &nn, &kk, &alpha, (double *)y, &lda, (double *)x,
                   &ldb, &beta, out, &ldc);
    }
}

/* ------------------------------------------------------------------------------------------ */
/* normal_pattern                                                                             */

static PyObject *pair_count(PyObject *self, PyObject *args) {
    PyObject *o_row_ptr, *o_slot_col;
    if (!PyArg_ParseTuple(args, "OO", &o_row_ptr, &o_slot_col)) return NULL;
    Buffers b = {.held = 0};
    Py_ssize_t len, nnz_a;
    const i64 *row_ptr = take(&b, o_row_ptr, 'i', 0, "row_ptr", &len);
    const i64 *slot_col = row_ptr ? take(&b, o_slot_col, 'i', 0, "slot_col", &nnz_a) : NULL;
    i64 total = 0;
    if (slot_col == NULL || check_pointers(row_ptr, len, 1, nnz_a, "row_ptr") < 0) {
        release_all(&b);
        return NULL;
    }
    for (Py_ssize_t r = 0; r + 1 < len; r++) {
        i64 kk = square(row_ptr[r + 1] - row_ptr[r]);
        if (kk < 0 || total > (i64)PY_SSIZE_T_MAX / 8 - kk) {
            release_all(&b);
            return PyErr_NoMemory();
        }
        total += kk;
    }
    release_all(&b);
    return PyLong_FromLongLong(total);
}

static int sort_ascending(const void *a, const void *b) {
    i64 x = *(const i64 *)a, y = *(const i64 *)b;
    return (x > y) - (x < y);
}

static void sort_rows(i64 *v, i64 count) {
    if (count > 32) {
        qsort(v, (size_t)count, sizeof(i64), sort_ascending);
        return;
    }
    for (i64 i = 1; i < count; i++) {
        i64 x = v[i], j = i;
        for (; j > 0 && v[j - 1] > x; j--) v[j] = v[j - 1];
        v[j] = x;
    }
}

static PyObject *normal_pattern(PyObject *self, PyObject *args) {
    Py_ssize_t n;
    PyObject *o_row_ptr, *o_slot_col, *o_indptr, *o_indices, *o_pair_ptr, *o_targets;
    if (!PyArg_ParseTuple(args, "nOOOOOO", &n, &o_row_ptr, &o_slot_col, &o_indptr, &o_indices,
                          &o_pair_ptr, &o_targets)) {
        return NULL;
    }
    Buffers b = {.held = 0};
    Py_ssize_t len_rp, nnz_a, len_ip, len_ix, len_pp, len_t;
    const i64 *row_ptr = take(&b, o_row_ptr, 'i', 0, "row_ptr", &len_rp);
    const i64 *slot_col = row_ptr ? take(&b, o_slot_col, 'i', 0, "slot_col", &nnz_a) : NULL;
    i64 *indptr = slot_col ? take(&b, o_indptr, 'i', 1, "indptr", &len_ip) : NULL;
    i64 *indices = indptr ? take(&b, o_indices, 'i', 1, "indices", &len_ix) : NULL;
    i64 *pair_ptr = indices ? take(&b, o_pair_ptr, 'i', 1, "pair_ptr", &len_pp) : NULL;
    i64 *targets = pair_ptr ? take(&b, o_targets, 'i', 1, "targets", &len_t) : NULL;
    i64 *col_ptr = NULL, *col_slot = NULL, *col_row = NULL, *fill = NULL, *mark = NULL;
    i64 *position = NULL, *buffer = NULL;
    PyObject *result = NULL;
    if (targets == NULL) goto done;
    for (int o = 2; o < 6; o++) {
        if (overlaps(&b, o)) goto done;
    }
    if (n < 0) {
        bad("n must not be negative");
        goto done;
    }
    if (check_pointers(row_ptr, len_rp, 1, nnz_a, "row_ptr") < 0) goto done;
    if (row_ptr[len_rp - 1] != (i64)nnz_a) {
        bad("row_ptr must end at the length of slot_col");
        goto done;
    }
    for (Py_ssize_t q = 0; q < nnz_a; q++) {
        if (slot_col[q] < 0 || slot_col[q] >= (i64)n) {
            bad("slot_col holds a column outside 0 … n−1");
            goto done;
        }
    }
    const i64 m = len_rp - 1;
    if (len_ip != n + 1 || len_pp != m + 1) {
        bad("indptr or pair_ptr has the wrong length");
        goto done;
    }
    pair_ptr[0] = 0;
    for (i64 r = 0; r < m; r++) {
        i64 kk = square(row_ptr[r + 1] - row_ptr[r]);
        if (kk < 0 || pair_ptr[r] > INT64_MAX - kk) {
            bad("too many products of slots");
            goto done;
        }
        pair_ptr[r + 1] = pair_ptr[r] + kk;
    }
    if (len_t != pair_ptr[m] || len_ix != pair_ptr[m]) {
        bad("targets and indices must hold one item per product of slots");
        goto done;
    }
    col_ptr = scratch(n + 1);
    col_slot = col_ptr ? scratch(nnz_a) : NULL;
    col_row = col_slot ? scratch(nnz_a) : NULL;
    fill = col_row ? scratch(n) : NULL;
    mark = fill ? scratch(n) : NULL;
    position = mark ? scratch(n) : NULL;
    buffer = position ? scratch(n) : NULL;
    if (buffer == NULL) goto done;
    i64 nnz = 0;
    Py_BEGIN_ALLOW_THREADS
    /* A by columns: for each column the slots that hold it */
    for (Py_ssize_t q = 0; q < nnz_a; q++) col_ptr[slot_col[q] + 1] += 1;
    for (i64 j = 0; j < n; j++) col_ptr[j + 1] += col_ptr[j];
    for (i64 j = 0; j < n; j++) fill[j] = col_ptr[j];
    for (i64 r = 0; r < m; r++) {
        for (i64 q = row_ptr[r]; q < row_ptr[r + 1]; q++) {
            i64 c = slot_col[q];
            col_slot[fill[c]] = q;
            col_row[fill[c]] = r;
            fill[c] += 1;
        }
    }
    indptr[0] = 0;
    for (i64 j = 0; j < n; j++) mark[j] = -1;
    for (i64 j = 0; j < n; j++) {
        i64 found = 0;
        for (i64 q = col_ptr[j]; q < col_ptr[j + 1]; q++) {
            i64 r = col_row[q];
            for (i64 s = row_ptr[r]; s < row_ptr[r + 1]; s++) {
                i64 i = slot_col[s];
                if (mark[i] != j) {
                    mark[i] = j;
                    buffer[found] = i;
                    found += 1;
                }
            }
        }
        sort_rows(buffer, found);
        for (i64 p = 0; p < found; p++) {
            indices[nnz + p] = buffer[p];
            position[buffer[p]] = nnz + p;
        }
        for (i64 q = col_ptr[j]; q < col_ptr[j + 1]; q++) {
            i64 r = col_row[q];
            i64 t = col_slot[q];
            i64 start = row_ptr[r];
            i64 k = row_ptr[r + 1] - start;
            for (i64 s = start; s < row_ptr[r + 1]; s++) {
                targets[pair_ptr[r] + (s - start) * k + (t - start)] = position[slot_col[s]];
            }
        }
        nnz += found;
        indptr[j + 1] = nnz;
    }
    Py_END_ALLOW_THREADS
    result = PyLong_FromLongLong(nnz);
done:
    PyMem_RawFree(col_ptr);
    PyMem_RawFree(col_slot);
    PyMem_RawFree(col_row);
    PyMem_RawFree(fill);
    PyMem_RawFree(mark);
    PyMem_RawFree(position);
    PyMem_RawFree(buffer);
    release_all(&b);
    return result;
}

/* ------------------------------------------------------------------------------------------ */
/* fill_normal and row_quadratic                                                              */

/* The rows' slot ranges and product blocks: row_ptr valid against the slot values, and every
 * row's block of k² targets inside targets. */
static int check_rows(const i64 *row_ptr, Py_ssize_t len_rp, Py_ssize_t len_sv,
                      const i64 *pair_ptr, Py_ssize_t len_pp, Py_ssize_t len_t) {
    if (check_pointers(row_ptr, len_rp, 0, len_sv, "row_ptr") < 0) return -1;
    Py_ssize_t m = len_rp - 1;
    if (len_pp < m + 1) return bad("pair_ptr is shorter than row_ptr");
    for (Py_ssize_t r = 0; r < m; r++) {
        i64 kk = square(row_ptr[r + 1] - row_ptr[r]);
        if (kk < 0 || pair_ptr[r] < 0 || pair_ptr[r] > (i64)len_t - kk) {
            return bad("pair_ptr points past the end of targets");
        }
    }
    return 0;
}

static PyObject *fill_normal(PyObject *self, PyObject *args) {
    PyObject *o_row_ptr, *o_slot_val, *o_weights, *o_pair_ptr, *o_targets, *o_data;
    if (!PyArg_ParseTuple(args, "OOOOOO", &o_row_ptr, &o_slot_val, &o_weights, &o_pair_ptr,
                          &o_targets, &o_data)) {
        return NULL;
    }
    Buffers b = {.held = 0};
    Py_ssize_t len_rp, len_sv, len_w, len_pp, len_t, nnz;
    const i64 *row_ptr = take(&b, o_row_ptr, 'i', 0, "row_ptr", &len_rp);
    const double *slot_val = row_ptr ? take(&b, o_slot_val, 'd', 0, "slot_val", &len_sv) : NULL;
    const double *weights = slot_val ? take(&b, o_weights, 'd', 0, "weights", &len_w) : NULL;
    const i64 *pair_ptr = weights ? take(&b, o_pair_ptr, 'i', 0, "pair_ptr", &len_pp) : NULL;
    const i64 *targets = pair_ptr ? take(&b, o_targets, 'i', 0, "targets", &len_t) : NULL;
    double *data = targets ? take(&b, o_data, 'd', 1, "data", &nnz) : NULL;
    if (data == NULL || overlaps(&b, 5) ||
        check_rows(row_ptr, len_rp, len_sv, pair_ptr, len_pp, len_t) < 0) {
        release_all(&b);
        return NULL;
    }
    const i64 m = len_rp - 1;
    if (len_w < m) {
        release_all(&b);
        bad("weights is shorter than the number of rows");
        return NULL;
    }
    int out_of_range = 0;
    Py_BEGIN_ALLOW_THREADS
    memset(data, 0, (size_t)nnz * sizeof(double));
    for (i64 r = 0; r < m && !out_of_range; r++) {
        i64 start = row_ptr[r];
        i64 k = row_ptr[r + 1] - start;
        const i64 *t = targets + pair_ptr[r];
        double w = weights[r];
        for (i64 a = 0; a < k; a++) {
            double wa = w * slot_val[start + a];
            i64 ta = t[a * k + a];
            if ((uint64_t)ta >= (uint64_t)nnz) {
                out_of_range = 1;
                break;
            }
            data[ta] += wa * slot_val[start + a];
            for (i64 c = a + 1; c < k; c++) {
                double term = wa * slot_val[start + c];
                i64 t1 = t[a * k + c], t2 = t[c * k + a];
                if ((uint64_t)t1 >= (uint64_t)nnz || (uint64_t)t2 >= (uint64_t)nnz) {
                    out_of_range = 1;
                    break;
                }
                data[t1] += term;
                data[t2] += term;
            }
            if (out_of_range) break;
        }
    }
    Py_END_ALLOW_THREADS
    release_all(&b);
    if (out_of_range) {
        bad("targets holds a position outside N's data");
        return NULL;
    }
    Py_RETURN_NONE;
}

static PyObject *row_quadratic(PyObject *self, PyObject *args) {
    PyObject *o_row_ptr, *o_slot_val, *o_pair_ptr, *o_targets, *o_q, *o_out;
    if (!PyArg_ParseTuple(args, "OOOOOO", &o_row_ptr, &o_slot_val, &o_pair_ptr, &o_targets,
                          &o_q, &o_out)) {
        return NULL;
    }
    Buffers b = {.held = 0};
    Py_ssize_t len_rp, len_sv, len_pp, len_t, len_q, len_out;
    const i64 *row_ptr = take(&b, o_row_ptr, 'i', 0, "row_ptr", &len_rp);
    const double *slot_val = row_ptr ? take(&b, o_slot_val, 'd', 0, "slot_val", &len_sv) : NULL;
    const i64 *pair_ptr = slot_val ? take(&b, o_pair_ptr, 'i', 0, "pair_ptr", &len_pp) : NULL;
    const i64 *targets = pair_ptr ? take(&b, o_targets, 'i', 0, "targets", &len_t) : NULL;
    const double *q_data = targets ? take(&b, o_q, 'd', 0, "q_data", &len_q) : NULL;
    double *out = q_data ? take(&b, o_out, 'd', 1, "out", &len_out) : NULL;
    if (out == NULL || overlaps(&b, 5) ||
        check_rows(row_ptr, len_rp, len_sv, pair_ptr, len_pp, len_t) < 0) {
        release_all(&b);
        return NULL;
    }
    const i64 m = len_rp - 1;
    if (len_out != m) {
        release_all(&b);
        bad("out must hold one item per row");
        return NULL;
    }
    int out_of_range = 0;
    Py_BEGIN_ALLOW_THREADS
    for (i64 r = 0; r < m; r++) {
        i64 start = row_ptr[r];
        i64 k = row_ptr[r + 1] - start;
        const i64 *t = targets + pair_ptr[r];
        double total = 0.0;
        for (i64 a = 0; a < k; a++) {
            for (i64 c = 0; c < k; c++) {
                i64 target = t[a * k + c];
                if ((uint64_t)target >= (uint64_t)len_q) {
                    out_of_range = 1;
                    break;
                }
                double q = q_data[target];
                total += slot_val[start + a] * slot_val[start + c] * q;
            }
            if (out_of_range) break;
        }
        if (out_of_range) break;
        out[r] = total;
    }
    Py_END_ALLOW_THREADS
    release_all(&b);
    if (out_of_range) {
        bad("targets holds a position outside q_data");
        return NULL;
    }
    Py_RETURN_NONE;
}

/* ------------------------------------------------------------------------------------------ */
/* supernodes                                                                                 */

/* Start columns of the supernodes into starts (n + 1 items), followed by n; returns the count
 * of supernodes.  indptr (n + 1) must already be checked against indices. */
static i64 find_supernodes(const i64 *indptr, i64 n, const i64 *indices, i64 *starts) {
    i64 count = 0;
    for (i64 j = 0; j < n; j++) {
        if (j == 0) {
            starts[count] = 0;
            count += 1;
            continue;
        }
        i64 previous = j - 1;
        i64 size_previous = indptr[j] - indptr[previous];
        i64 size_here = indptr[j + 1] - indptr[j];
        int joined = size_previous == size_here + 1 && size_previous >= 2;
        if (joined && indices[indptr[previous] + 1] != j) joined = 0;
        if (!joined) {
            starts[count] = j;
            count += 1;
        }
    }
    starts[count] = n;
    return count;
}

static PyObject *supernodes(PyObject *self, PyObject *args) {
    PyObject *o_indptr, *o_indices, *o_starts;
    if (!PyArg_ParseTuple(args, "OOO", &o_indptr, &o_indices, &o_starts)) return NULL;
    Buffers b = {.held = 0};
    Py_ssize_t len_ip, len_ix, len_s;
    const i64 *indptr = take(&b, o_indptr, 'i', 0, "indptr", &len_ip);
    const i64 *indices = indptr ? take(&b, o_indices, 'i', 0, "indices", &len_ix) : NULL;
    i64 *starts = indices ? take(&b, o_starts, 'i', 1, "starts", &len_s) : NULL;
    if (starts == NULL || overlaps(&b, 2) ||
        check_pointers(indptr, len_ip, 0, len_ix, "indptr") < 0) {
        release_all(&b);
        return NULL;
    }
    if (len_s != len_ip) {
        release_all(&b);
        bad("starts must hold n + 1 items");
        return NULL;
    }
    i64 count = find_supernodes(indptr, len_ip - 1, indices, starts);
    release_all(&b);
    return PyLong_FromLongLong(count);
}

/* ------------------------------------------------------------------------------------------ */
/* selected_inverse                                                                           */

#define NOT_FILLED 1
#define NOT_FINITE 2
#define SINGULAR 3
#define NO_MEMORY 4

/* One supernode's dense blocks (row-major), sized for the largest supernode. */
typedef struct {
    double *ljj, *lrj, *linv, *zjj, *zrr, *y, *zry, *product, *scaled;
    i64 *below;
    int *ipiv;
} Blocks;

/* The supernode's dense unit lower L_JJ (width²) and the rows below it, L_RJ. */
static void supernode_block(const i64 *indptr, const double *lower, i64 j0, i64 width,
                            i64 height, double *ljj, double *lrj) {
    memset(ljj, 0, (size_t)(width * width) * sizeof(double));
    for (i64 c = 0; c < width; c++) {
        i64 p = indptr[j0 + c];
        for (i64 a = c; a < width; a++) ljj[a * width + c] = lower[p + a - c];
        for (i64 a = 0; a < height; a++) lrj[a * width + c] = lower[p + width - c + a];
    }
}

/* numba's np.linalg.inv: LAPACK's LU and inverse on a Fortran-ordered copy. */
static int blas_inverse(const double *ljj, i64 width, double *linv, double *work_f, int *ipiv) {
    for (i64 i = 0; i < width * width; i++) {
        if (!isfinite(ljj[i])) return NOT_FINITE;
    }
    for (i64 a = 0; a < width; a++) {
        for (i64 c = 0; c < width; c++) work_f[c * width + a] = ljj[a * width + c];
    }
    int w = (int)width, info = 0, lwork = -1;
    lapack_dgetrf(&w, &w, work_f, &w, ipiv, &info);
    if (info != 0) return SINGULAR;
    double query = 0.0;
    lapack_dgetri(&w, work_f, &w, ipiv, &query, &lwork, &info);
    lwork = (int)query;
    double *work = PyMem_RawMalloc(sizeof(double) * (size_t)(lwork > 0 ? lwork : 1));
    if (work == NULL) return NO_MEMORY;
    lapack_dgetri(&w, work_f, &w, ipiv, work, &lwork, &info);
    PyMem_RawFree(work);
    if (info != 0) return SINGULAR;
    for (i64 a = 0; a < width; a++) {
        for (i64 c = 0; c < width; c++) linv[a * width + c] = work_f[c * width + a];
    }
    return 0;
}

/* L_JJ⁻¹ and L_JJ⁻ᵀ·D_J⁻¹·L_JJ⁻¹ (lower triangle): loops for a narrow block, BLAS else. */
static int diagonal_block(Blocks *k, i64 width, const double *pivots) {
    double *ljj = k->ljj, *linv = k->linv, *zjj = k->zjj;
    if (width > 24) {
        int status = blas_inverse(ljj, width, linv, k->scaled, k->ipiv);
        if (status) return status;
        /* linv.T / pivots: a new C-ordered array */
        for (i64 a = 0; a < width; a++) {
            for (i64 c = 0; c < width; c++) {
                k->scaled[a * width + c] = linv[c * width + a] / pivots[c];
            }
        }
        numba_dot(k->scaled, 0, linv, zjj, width, width, width);
        return 0;
    }
    memset(linv, 0, (size_t)(width * width) * sizeof(double));
    for (i64 c = 0; c < width; c++) {
        linv[c * width + c] = 1.0;
        for (i64 a = c + 1; a < width; a++) {
            double total = 0.0;
            for (i64 q = c; q < a; q++) total += ljj[a * width + q] * linv[q * width + c];
            linv[a * width + c] = -total;
        }
    }
    memset(zjj, 0, (size_t)(width * width) * sizeof(double));
    for (i64 a = 0; a < width; a++) {
        for (i64 c = 0; c <= a; c++) {
            double total = 0.0;
            for (i64 q = a; q < width; q++) {
                total += linv[q * width + a] * linv[q * width + c] / pivots[q];
            }
            zjj[a * width + c] = total;
        }
    }
    return 0;
}

/* out (rows x cols) = a (rows x inner) · b (inner x cols) by loops, zero terms of a skipped. */
static void small_product(const double *a, const double *b, double *out, i64 rows, i64 inner,
                          i64 cols) {
    memset(out, 0, (size_t)(rows * cols) * sizeof(double));
    for (i64 i = 0; i < rows; i++) {
        for (i64 q = 0; q < inner; q++) {
            double aiq = a[i * inner + q];
            if (aiq != 0.0) {
                for (i64 j = 0; j < cols; j++) out[i * cols + j] += aiq * b[q * cols + j];
            }
        }
    }
}

/* Z_RR·Y with Y = L_RJ·L_JJ⁻¹ into zry; adds Yᵀ·Z_RR·Y to zjj (lower triangle). */
static void below_block(Blocks *k, i64 height, i64 width) {
    if (height * width > 64) {
        numba_dot(k->lrj, 0, k->linv, k->y, height, width, width);
    } else {
        small_product(k->lrj, k->linv, k->y, height, width, width);
    }
    if (height * height * width > 4096) {
        numba_dot(k->zrr, 0, k->y, k->zry, height, width, height);
    } else {
        small_product(k->zrr, k->y, k->zry, height, height, width);
    }
    if (height * width * width > 4096) {
        numba_dot(k->y, 1, k->zry, k->product, width, width, height);  /* y.T · zry */
        for (i64 i = 0; i < width * width; i++) k->zjj[i] += k->product[i];
        return;
    }
    for (i64 a = 0; a < width; a++) {
        for (i64 c = 0; c <= a; c++) {
            double total = 0.0;
            for (i64 q = 0; q < height; q++) total += k->y[q * width + a] * k->zry[q * width + c];
            k->zjj[a * width + c] += total;
        }
    }
}

/* Z_RR (dense, both triangles) from the columns of the supernodes already done. */
static int gather(const double *z, const i64 *indptr, const i64 *indices, const i64 *rows,
                  i64 height, const i64 *starts, const i64 *column_supernode, double *zrr,
                  i64 *below) {
    i64 b = 0;
    while (b < height) {
        i64 t = column_supernode[rows[b]];
        i64 t1 = starts[t + 1];
        i64 b2 = b;
        while (b2 < height && rows[b2] < t1) b2 += 1;
        i64 tail_first = indptr[t1 - 1] + 1;
        i64 tail_last = indptr[t1];
        for (i64 a = b2; a < height; a++) { /* position of rows[a] among the rows below T */
            i64 lo = tail_first, hi = tail_last;
            while (lo < hi) {
                i64 mid = (lo + hi) >> 1;
                if (indices[mid] < rows[a]) {
                    lo = mid + 1;
                } else {
                    hi = mid;
                }
            }
            /* on a filled pattern it is there; elsewhere the recurrences would leave it */
            if (lo >= tail_last || indices[lo] != rows[a]) return NOT_FILLED;
            below[a] = lo - tail_first;
        }
        for (i64 bb = b; bb < b2; bb++) {
            i64 c = rows[bb];
            i64 pc = indptr[c];
            for (i64 a = bb; a < b2; a++) {
                double value = z[pc + rows[a] - c];
                zrr[a * height + bb] = value;
                zrr[bb * height + a] = value;
            }
            i64 offset = pc + t1 - c;
            for (i64 a = b2; a < height; a++) {
                double value = z[offset + below[a]];
                zrr[a * height + bb] = value;
                zrr[bb * height + a] = value;
            }
        }
        b = b2;
    }
    return 0;
}

/* Joined columns must share their structure below the block (what the blocked recurrences
 * assume; true of every filled pattern). */
static int check_supernodes(const i64 *indptr, const i64 *indices, const i64 *starts,
                            i64 count) {
    for (i64 s = 0; s < count; s++) {
        for (i64 j = starts[s] + 1; j < starts[s + 1]; j++) {
            i64 p = indptr[j - 1] + 1, q = indptr[j];
            for (i64 i = 0; i < indptr[j + 1] - q; i++) {
                if (indices[p + i] != indices[q + i]) return NOT_FILLED;
            }
        }
    }
    return 0;
}

static int blocked_inverse(const i64 *indptr, const i64 *indices, const double *lower,
                           const double *pivots, double *z, i64 n, const i64 *starts,
                           i64 count, Blocks *k) {
    i64 *column_supernode = PyMem_RawMalloc(sizeof(i64) * (size_t)(n > 0 ? n : 1));
    if (column_supernode == NULL) return NO_MEMORY;
    for (i64 s = 0; s < count; s++) {
        for (i64 j = starts[s]; j < starts[s + 1]; j++) column_supernode[j] = s;
    }
    int status = 0;
    for (i64 s = count - 1; s >= 0 && status == 0; s--) {
        i64 j0 = starts[s];
        i64 j1 = starts[s + 1];
        i64 width = j1 - j0;
        i64 tail_first = indptr[j1 - 1] + 1;
        i64 height = indptr[j1] - tail_first;
        const i64 *rows = indices + tail_first;
        supernode_block(indptr, lower, j0, width, height, k->ljj, k->lrj);
        status = diagonal_block(k, width, pivots + j0);
        if (status) break;
        if (height > 0) {
            status = gather(z, indptr, indices, rows, height, starts, column_supernode, k->zrr,
                            k->below);
            if (status) break;
            below_block(k, height, width);
            for (i64 c = 0; c < width; c++) {
                i64 p = indptr[j0 + c] + width - c;
                for (i64 a = 0; a < height; a++) z[p + a] = -k->zry[a * width + c];
            }
        }
        for (i64 c = 0; c < width; c++) {
            i64 p = indptr[j0 + c];
            for (i64 a = c; a < width; a++) z[p + a - c] = k->zjj[a * width + c];
        }
    }
    PyMem_RawFree(column_supernode);
    return status;
}

/* The arguments every selected inverse takes, checked: (indptr, indices, lower, pivots, z). */
typedef struct {
    const i64 *indptr, *indices;
    const double *lower, *pivots;
    double *z;
    i64 n, nnz;
} Factor;

static int take_factor(PyObject *args, Buffers *b, Factor *f) {
    PyObject *o_indptr, *o_indices, *o_lower, *o_pivots, *o_z;
    if (!PyArg_ParseTuple(args, "OOOOO", &o_indptr, &o_indices, &o_lower, &o_pivots, &o_z)) {
        return -1;
    }
    Py_ssize_t len_ip, len_ix, len_l, len_p, len_z;
    f->indptr = take(b, o_indptr, 'i', 0, "indptr", &len_ip);
    f->indices = f->indptr ? take(b, o_indices, 'i', 0, "indices", &len_ix) : NULL;
    f->lower = f->indices ? take(b, o_lower, 'd', 0, "lower", &len_l) : NULL;
    f->pivots = f->lower ? take(b, o_pivots, 'd', 0, "pivots", &len_p) : NULL;
    f->z = f->pivots ? take(b, o_z, 'd', 1, "z", &len_z) : NULL;
    if (f->z == NULL || overlaps(b, 4)) return -1;
    if (len_ip < 1) return bad("indptr must hold n + 1 items");
    f->n = len_ip - 1;
    f->nnz = len_ix;
    if (len_l != len_ix || len_z != len_ix || len_p != f->n) {
        return bad("indices, lower and z must have one length, pivots n items");
    }
    return check_factor(f->indptr, f->n, f->indices, len_ix);
}

static PyObject *failed(int status) {
    if (status == NOT_FILLED) {
        bad("the pattern of the factor is not filled (a row the recurrences need is missing)");
    } else if (status == NOT_FINITE) {
        bad("the factor holds infinite or NaN values");
    } else if (status == SINGULAR) {
        bad("a diagonal block of the factor is singular to machine precision");
    } else {
        PyErr_NoMemory();
    }
    return NULL;
}

static PyObject *selected_inverse(PyObject *self, PyObject *args) {
    Buffers b = {.held = 0};
    Factor f;
    i64 *starts = NULL;
    Blocks k = {0};
    PyObject *result = NULL;
    if (take_factor(args, &b, &f) < 0) goto done;
    const i64 n = f.n;
    starts = scratch(n + 1);
    if (starts == NULL) goto done;
    i64 count = find_supernodes(f.indptr, n, f.indices, starts);
    if (check_supernodes(f.indptr, f.indices, starts, count)) {
        failed(NOT_FILLED);
        goto done;
    }
    /* the largest blocks, and whether any is large enough for BLAS */
    i64 max_w = 1, max_h = 1;
    int large = 0;
    for (i64 s = 0; s < count; s++) {
        i64 width = starts[s + 1] - starts[s];
        i64 height = f.indptr[starts[s + 1]] - f.indptr[starts[s + 1] - 1] - 1;
        /* dense blocks beyond these (terabytes) cannot be had; the bounds also keep every
         * product of sizes below and every size handed to BLAS within a Fortran integer */
        if (width > 46340 || height > (1 << 20) || height * width > (i64)INT32_MAX) {
            PyErr_NoMemory();
            goto done;
        }
        if (width > max_w) max_w = width;
        if (height > max_h) max_h = height;
        if (width > 24 || (height > 0 && (height * width > 64 || height * height * width > 4096 ||
                                          height * width * width > 4096))) {
            large = 1;
        }
    }
    if (large && load_lapack() < 0) goto done;
    i64 ww = max_w * max_w, hw = max_h * max_w;
    if (!(k.ljj = scratch(ww)) || !(k.lrj = scratch(hw)) || !(k.linv = scratch(ww)) ||
        !(k.zjj = scratch(ww)) || !(k.zrr = scratch(max_h * max_h)) || !(k.y = scratch(hw)) ||
        !(k.zry = scratch(hw)) || !(k.product = scratch(ww)) || !(k.scaled = scratch(ww)) ||
        !(k.below = scratch(max_h)) || !(k.ipiv = scratch(max_w))) {
        goto done;
    }
    int status;
    Py_BEGIN_ALLOW_THREADS
    memset(f.z, 0, (size_t)f.nnz * sizeof(double));
    status = blocked_inverse(f.indptr, f.indices, f.lower, f.pivots, f.z, n, starts, count, &k);
    Py_END_ALLOW_THREADS
    if (status) {
        failed(status);
        goto done;
    }
    result = Py_None;
    Py_INCREF(result);
done:
    PyMem_RawFree(starts);
    PyMem_RawFree(k.ljj);
    PyMem_RawFree(k.lrj);
    PyMem_RawFree(k.linv);
    PyMem_RawFree(k.zjj);
    PyMem_RawFree(k.zrr);
    PyMem_RawFree(k.y);
    PyMem_RawFree(k.zry);
    PyMem_RawFree(k.product);
    PyMem_RawFree(k.scaled);
    PyMem_RawFree(k.below);
    PyMem_RawFree(k.ipiv);
    release_all(&b);
    return result;
}

static PyObject *selected_inverse_columns(PyObject *self, PyObject *args) {
    Buffers b = {.held = 0};
    Factor f;
    if (take_factor(args, &b, &f) < 0) {
        release_all(&b);
        return NULL;
    }
    const i64 n = f.n;
    i64 *slot = scratch(n);
    double *acc = slot ? scratch(n) : NULL;
    if (acc == NULL) {
        PyMem_RawFree(slot);
        release_all(&b);
        return NULL;
    }
    const i64 *indptr = f.indptr, *indices = f.indices;
    const double *lower = f.lower;
    double *z = f.z;
    Py_BEGIN_ALLOW_THREADS
    memset(z, 0, (size_t)f.nnz * sizeof(double));
    for (i64 j = 0; j < n; j++) slot[j] = -1;
    for (i64 j = n - 1; j >= 0; j--) {
        i64 first = indptr[j] + 1;
        i64 last = indptr[j + 1];
        for (i64 q = first; q < last; q++) {
            slot[indices[q]] = q - first;
            acc[q - first] = 0.0;
        }
        for (i64 c = 0; c < last - first; c++) {
            i64 k = indices[first + c];
            double l_kj = lower[first + c];
            acc[c] += z[indptr[k]] * l_kj; /* Z_kk·L_kj */
            for (i64 zq = indptr[k] + 1; zq < indptr[k + 1]; zq++) {
                i64 r = slot[indices[zq]];
                if (r >= 0) {
                    double z_rk = z[zq];
                    acc[r] += z_rk * l_kj;          /* Z_rk·L_kj into Z_rj */
                    acc[c] += z_rk * lower[first + r]; /* Z_kr·L_rj into Z_kj */
                }
            }
        }
        double diagonal = 1.0 / f.pivots[j];
        for (i64 c = 0; c < last - first; c++) {
            z[first + c] = -acc[c];
            diagonal += lower[first + c] * acc[c];
            slot[indices[first + c]] = -1;
        }
        z[indptr[j]] = diagonal;
    }
    Py_END_ALLOW_THREADS
    PyMem_RawFree(slot);
    PyMem_RawFree(acc);
    release_all(&b);
    Py_RETURN_NONE;
}

/* ------------------------------------------------------------------------------------------ */
/* lookup                                                                                     */

static PyObject *lookup(PyObject *self, PyObject *args) {
    PyObject *o_indptr, *o_indices, *o_rows, *o_cols, *o_out;
    if (!PyArg_ParseTuple(args, "OOOOO", &o_indptr, &o_indices, &o_rows, &o_cols, &o_out)) {
        return NULL;
    }
    Buffers b = {.held = 0};
    Py_ssize_t len_ip, len_ix, len_r, len_c, len_out;
    const i64 *indptr = take(&b, o_indptr, 'i', 0, "indptr", &len_ip);
    const i64 *indices = indptr ? take(&b, o_indices, 'i', 0, "indices", &len_ix) : NULL;
    const i64 *rows = indices ? take(&b, o_rows, 'i', 0, "rows", &len_r) : NULL;
    const i64 *cols = rows ? take(&b, o_cols, 'i', 0, "cols", &len_c) : NULL;
    i64 *out = cols ? take(&b, o_out, 'i', 1, "out", &len_out) : NULL;
    if (out == NULL || overlaps(&b, 4) ||
        check_pointers(indptr, len_ip, 0, len_ix, "indptr") < 0) {
        release_all(&b);
        return NULL;
    }
    if (len_c != len_r || len_out != len_r) {
        release_all(&b);
        bad("rows, cols and out must have one length");
        return NULL;
    }
    const i64 n = len_ip - 1;
    int out_of_range = 0;
    Py_BEGIN_ALLOW_THREADS
    for (i64 p = 0; p < len_r; p++) {
        i64 col = cols[p];
        if (col < 0 || col >= n) {
            out_of_range = 1;
            break;
        }
        i64 lo = indptr[col];
        i64 hi = indptr[col + 1];
        i64 target = rows[p];
        while (lo < hi) {
            i64 mid = (lo + hi) >> 1;
            if (indices[mid] < target) {
                lo = mid + 1;
            } else {
                hi = mid;
            }
        }
        out[p] = lo < indptr[col + 1] && indices[lo] == target ? lo : -1;
    }
    Py_END_ALLOW_THREADS
    release_all(&b);
    if (out_of_range) {
        bad("cols holds a column outside the pattern");
        return NULL;
    }
    Py_RETURN_NONE;
}

/* ------------------------------------------------------------------------------------------ */

static PyMethodDef methods[] = {
    {"pair_count", pair_count, METH_VARARGS,
     "pair_count(row_ptr, slot_col) -> Σ k_r², the number of slot products."},
    {"normal_pattern", normal_pattern, METH_VARARGS,
     "normal_pattern(n, row_ptr, slot_col, indptr, indices, pair_ptr, targets) -> nnz"},
    {"fill_normal", fill_normal, METH_VARARGS,
     "fill_normal(row_ptr, slot_val, weights, pair_ptr, targets, data)"},
    {"row_quadratic", row_quadratic, METH_VARARGS,
     "row_quadratic(row_ptr, slot_val, pair_ptr, targets, q_data, out)"},
    {"supernodes", supernodes, METH_VARARGS, "supernodes(indptr, indices, starts) -> count"},
    {"selected_inverse", selected_inverse, METH_VARARGS,
     "selected_inverse(indptr, indices, lower, pivots, z)"},
    {"selected_inverse_columns", selected_inverse_columns, METH_VARARGS,
     "selected_inverse_columns(indptr, indices, lower, pivots, z)"},
    {"lookup", lookup, METH_VARARGS, "lookup(indptr, indices, rows, cols, out)"},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT,
    .m_name = "_kernels_c",
    .m_doc = "The sparse engine's kernels in C (see kernels.py; the caller allocates outputs).",
    .m_size = -1,
    .m_methods = methods,
};

PyMODINIT_FUNC PyInit__kernels_c(void) { return PyModule_Create(&module); }
