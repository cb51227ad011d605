/* Numbers into the CLI: comma-separated vectors on the command line, and matrices from CSV or
 * .npy files (.npy through libveer's reader, src/base/npy.h).
 *
 * Everything read is checked here, before it goes anywhere near veerd: every value finite and
 * every row the same length, with the file, line and column of the first bad value. veerd checks
 * again, but a user fixing a file wants the line number, which only the reader knows. CSV is
 * parsed by hand because it is a dozen lines of strtod: a CSV library would add a dependency for
 * quoting rules that numeric files do not use. */
#include "cli_conn.h"

#include <errno.h>
#include <math.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#include "base/base.h"
#include "base/npy.h"
#include "cli.h"

void veer_cli_matrix_free(veer_cli_matrix *m)
{
    if (m == NULL)
        return;
    veer__free(m->values);
    m->values = NULL;
    m->rows = m->cols = 0;
}

static const char *nonfinite_name(double x)
{
    return isnan(x) ? "NaN" : "infinite";
}

/* Parses one line of comma-separated numbers into `row` (grown as needed). Returns the number
 * of values, or -1 with *bad_col set to the 1-based column that is not a number, or -2 with
 * *bad_col set where the value is not finite. */
static long parse_row(char *line, float **row, size_t *cap, size_t *bad_col)
{
    size_t n = 0;
    char *p = line;
    for (;;) {
        while (*p == ' ' || *p == '\t')
            p++;
        char *end;
        errno = 0;
        double x = strtod(p, &end);
        if (end == p) {
            *bad_col = n + 1;
            return -1;
        }
        if (n == *cap) {
            size_t nc = *cap ? *cap * 2 : 16;
            float *g = veer__realloc(*row, nc * sizeof **row);
            if (g == NULL) {
                *bad_col = 0;
                return -1;
            }
            *row = g;
            *cap = nc;
        }
        (*row)[n++] = (float)x;
        if (!isfinite(x) || !isfinite((float)x)) {
            *bad_col = n;
            return -2;
        }
        p = end;
        while (*p == ' ' || *p == '\t' || *p == '\r' || *p == '\n')
            p++;
        if (*p == '\0')
            return (long)n;
        if (*p != ',') {
            *bad_col = n + 1;
            return -1;
        }
        p++;
    }
}

int veer_cli_parse_vector(const veer_cli_conn *cc, const char *text, const char *flag,
                          veer_cli_matrix *out)
{
    memset(out, 0, sizeof *out);
    char *copy = veer__strdup(text);
    float *row = NULL;
    size_t cap = 0, bad = 0;
    long n = copy ? parse_row(copy, &row, &cap, &bad) : -1;
    veer__free(copy);
    if (n < 0) {
        double x = n == -2 ? row[bad - 1] : 0;
        veer__free(row);
        if (n == -2)
            return veer_cli_complain(cc, VEER_CLI_USAGE, flag,
                                     "%s: value %zu is %s; give finite numbers like 0.5,-1,2", flag,
                                     bad, nonfinite_name(x));
        return veer_cli_complain(cc, VEER_CLI_USAGE, flag,
                                 "%s: value %zu of '%s' is not a number; give comma-separated "
                                 "numbers like 0.5,-1,2",
                                 flag, bad, text);
    }
    out->values = row;
    out->rows = 1;
    out->cols = (size_t)n;
    return 0;
}

static int read_csv(const veer_cli_conn *cc, const char *path, veer_cli_matrix *out)
{
    FILE *f = fopen(path, "r");
    if (f == NULL)
        return veer_cli_complain(cc, VEER_CLI_INPUT, path, "cannot read '%s': %s", path,
                                 strerror(errno));
    char *line = NULL;
    size_t line_cap = 0, row_cap = 0, all_cap = 0, lineno = 0, bad = 0;
    float *row = NULL, *all = NULL;
    int rc = 0, seen_data = 0;
    ssize_t len;
    while ((len = getline(&line, &line_cap, f)) >= 0) {
        lineno++;
        char *p = line;
        while (*p == ' ' || *p == '\t')
            p++;
        if (*p == '#' || *p == '\n' || *p == '\r' || *p == '\0')
            continue;
        long n = parse_row(p, &row, &row_cap, &bad);
        if (n == -1 && !seen_data && lineno == 1)
            continue; /* a header line of feature names */
        if (n == -1) {
            rc = veer_cli_complain(cc, VEER_CLI_INPUT, path,
                                   "%s line %zu, column %zu: not a number; the file must hold "
                                   "comma-separated numbers, one row per line",
                                   path, lineno, bad);
            break;
        }
        if (n == -2) {
            rc = veer_cli_complain(cc, VEER_CLI_INPUT, path,
                                   "%s line %zu, column %zu: %s; every value must be finite", path,
                                   lineno, bad, nonfinite_name(row[bad - 1]));
            break;
        }
        if (seen_data && (size_t)n != out->cols) {
            rc = veer_cli_complain(cc, VEER_CLI_INPUT, path,
                                   "%s line %zu has %ld values where the rows before have %zu; "
                                   "every row must be the same length",
                                   path, lineno, n, out->cols);
            break;
        }
        out->cols = (size_t)n;
        seen_data = 1;
        if ((out->rows + 1) * out->cols > all_cap) {
            size_t nc = all_cap ? all_cap * 2 : 64 * out->cols;
            while (nc < (out->rows + 1) * out->cols)
                nc *= 2;
            float *g = veer__realloc(all, nc * sizeof *all);
            if (g == NULL) {
                rc = veer_cli_complain(cc, VEER_CLI_INPUT, path, "%s: out of memory", path);
                break;
            }
            all = g;
            all_cap = nc;
        }
        memcpy(all + out->rows * out->cols, row, out->cols * sizeof *row);
        out->rows++;
    }
    if (rc == 0 && ferror(f))
        rc = veer_cli_complain(cc, VEER_CLI_INPUT, path, "reading '%s' failed", path);
    if (rc == 0 && out->rows == 0)
        rc = veer_cli_complain(cc, VEER_CLI_INPUT, path, "%s holds no rows of numbers", path);
    free(line);
    veer__free(row);
    fclose(f);
    if (rc != 0) {
        veer__free(all);
        memset(out, 0, sizeof *out);
        return rc;
    }
    out->values = all;
    return 0;
}

static int read_npy(const veer_cli_conn *cc, const char *path, veer_cli_matrix *out)
{
    veer__npy a;
    veer_error err;
    veer_error_clear(&err);
    if (veer__npy_read(path, &a, &err) != 0)
        return veer_cli_complain(cc, VEER_CLI_INPUT, path, "%s (%s)", err.message,
                                 err.field[0] ? err.field : "file");
    int rc = 0;
    if (a.dtype != VEER_NPY_F32 && a.dtype != VEER_NPY_F64)
        rc = veer_cli_complain(cc, VEER_CLI_INPUT, path,
                               "%s holds %s; save it as float32 or float64", path,
                               veer__npy_dtype_name(a.dtype));
    else if (a.ndim != 1 && a.ndim != 2)
        rc = veer_cli_complain(cc, VEER_CLI_INPUT, path,
                               "%s has %u dimensions; give a vector or a rows x columns matrix",
                               path, a.ndim);
    else if (a.count == 0)
        rc = veer_cli_complain(cc, VEER_CLI_INPUT, path, "%s is empty", path);
    if (rc != 0) {
        veer__npy_free(&a);
        return rc;
    }
    out->rows = a.ndim == 2 ? a.shape[0] : a.shape[0];
    out->cols = a.ndim == 2 ? a.shape[1] : 1;
    out->values = veer__malloc(a.count * sizeof(float));
    if (out->values == NULL) {
        veer__npy_free(&a);
        return veer_cli_complain(cc, VEER_CLI_INPUT, path, "%s: out of memory", path);
    }
    for (uint64_t i = 0; i < a.count; i++) {
        double x =
            a.dtype == VEER_NPY_F32 ? ((const float *)a.data)[i] : ((const double *)a.data)[i];
        if (!isfinite(x) || !isfinite((float)x)) {
            rc = veer_cli_complain(cc, VEER_CLI_INPUT, path,
                                   "%s row %llu, column %llu: %s; every value must be finite "
                                   "(and fit a float32)",
                                   path, (unsigned long long)(i / out->cols + 1),
                                   (unsigned long long)(i % out->cols + 1), nonfinite_name(x));
            break;
        }
        out->values[i] = (float)x;
    }
    veer__npy_free(&a);
    if (rc != 0)
        veer_cli_matrix_free(out);
    return rc;
}

int veer_cli_read_matrix(const veer_cli_conn *cc, const char *path, veer_cli_matrix *out)
{
    memset(out, 0, sizeof *out);
    size_t n = strlen(path);
    if (n > 4 && strcmp(path + n - 4, ".npy") == 0)
        return read_npy(cc, path, out);
    if (n > 4 && strcmp(path + n - 4, ".csv") == 0)
        return read_csv(cc, path, out);
    return veer_cli_complain(cc, VEER_CLI_USAGE, path,
                             "'%s': give a .csv or .npy file (the name must end so)", path);
}
