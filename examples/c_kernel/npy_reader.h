/*
 * A strict reader (and a small writer) of the .npy files of refnorm's portable test vectors
 * (docs/vectors.md): NPY format version 1.0 (NumPy's numpy.lib.format), little-endian, C order.
 * C99, no dependencies beyond the C library.
 *
 * A file is refused, with one of the NPY_E* codes below, unless: it starts with the magic string
 * "\x93NUMPY" and the version bytes 1, 0; its header is at most NPY_MAX_HEADER bytes of printable
 * ASCII holding a Python dict literal with exactly the keys 'descr', 'fortran_order' and 'shape';
 * descr is one of '<f8', '<f4', '<f2', '<u2', '|u1' (object arrays, '|O', are pickles: refused);
 * fortran_order is False; shape is a tuple of at most NPY_MAX_NDIM integers >= 0 with at most
 * NPY_MAX_ELEMENTS elements; and the file holds exactly the header and the data, no byte more or
 * less. These are the limits of refnorm's own reader (conformance/vectors/npy.py).
 */
#ifndef REFNORM_NPY_READER_H
#define REFNORM_NPY_READER_H

#include <stddef.h>
#include <stdint.h>

#ifdef __cplusplus
extern "C" {
#endif

#define NPY_MAX_HEADER 10000
#define NPY_MAX_NDIM 32
#define NPY_MAX_ELEMENTS ((int64_t)1 << 28)

enum {
    NPY_OK = 0,
    NPY_EOPEN = 1,      /* the file cannot be opened, examined or read */
    NPY_EMAGIC = 2,     /* no \x93NUMPY magic string */
    NPY_EVERSION = 3,   /* not version 1.0 */
    NPY_EHEADER = 4,    /* the header is too long, not ASCII, or not the dict literal described above */
    NPY_EDTYPE = 5,     /* descr is not one of the five element types (a pickle, big-endian, structured) */
    NPY_EORDER = 6,     /* fortran_order is not False */
    NPY_ESHAPE = 7,     /* shape is not a tuple of integers >= 0, or has too many dims or elements */
    NPY_ESIZE = 8,      /* the file is truncated, or has bytes after the data */
    NPY_ENOMEM = 9,     /* the data could not be allocated */
    NPY_EMISMATCH = 10  /* the file is valid but not of the element type or shape the caller asked for */
};

typedef struct {
    char descr[4];                 /* "<f8", "<f4", "<f2", "<u2" or "|u1" */
    size_t itemsize;               /* 8, 4, 2, 2 or 1 */
    int32_t ndim;
    int64_t shape[NPY_MAX_NDIM];
    int64_t count;                 /* product of the shape */
    void *data;                    /* count * itemsize bytes, C order; release with npy_free */
} npy_array;

/* A message for an NPY_E* code. */
const char *npy_strerror(int code);

/* Read path into *out. On failure nothing is allocated, *out is zeroed, and detail (when not NULL)
 * receives a one-line explanation (at most detail_size bytes, NUL-terminated). */
int npy_read(const char *path, npy_array *out, char *detail, size_t detail_size);

/* npy_read, then require the element type descr and, when ndim >= 0, that shape. */
int npy_read_expect(const char *path, const char *descr, int32_t ndim, const int64_t *shape, npy_array *out,
                    char *detail, size_t detail_size);

void npy_free(npy_array *a);

/* Write a version 1.0 file of count = prod(shape) elements of the element type descr. Returns NPY_OK,
 * NPY_EDTYPE, NPY_ESHAPE or NPY_EOPEN. */
int npy_write(const char *path, const char *descr, int32_t ndim, const int64_t *shape, const void *data);

#ifdef __cplusplus
}
#endif

#endif /* REFNORM_NPY_READER_H */
