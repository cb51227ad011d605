/* Shared by the service fuzz targets: the model they serve (the small bundle in
 * tests/fuzz/fixtures, whose path CMake compiles in) and a scratch directory on a memory file
 * system when there is one, removed at exit. Not a module of veer: test support only. */
#ifndef VEER_FUZZ_COMMON_H
#define VEER_FUZZ_COMMON_H

#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#include "veer/runtime.h"

#ifndef VEER_FUZZ_BUNDLE
#error "VEER_FUZZ_BUNDLE must name the bundle the service targets load"
#endif

static char fuzz_dir_path[256];

static inline void fuzz_dir_remove(void)
{
    char cmd[320];
    if (fuzz_dir_path[0] == '\0')
        return;
    snprintf(cmd, sizeof cmd, "rm -rf '%s'", fuzz_dir_path);
    if (system(cmd) != 0)
        fprintf(stderr, "fuzz: could not remove %s\n", fuzz_dir_path);
}

/* A fresh private directory, on /dev/shm when it exists (fdatasync there costs nothing). */
static inline const char *fuzz_dir(const char *tag)
{
    if (fuzz_dir_path[0] != '\0')
        return fuzz_dir_path;
    snprintf(fuzz_dir_path, sizeof fuzz_dir_path, "%s/veer-fuzz-%s-XXXXXX",
             access("/dev/shm", W_OK) == 0 ? "/dev/shm" : "/tmp", tag);
    if (mkdtemp(fuzz_dir_path) == NULL) {
        perror("fuzz: mkdtemp");
        abort();
    }
    atexit(fuzz_dir_remove);
    return fuzz_dir_path;
}

static inline veer_bundle *fuzz_bundle_open(void)
{
    veer_bundle *b = NULL;
    veer_error err;
    if (veer_bundle_open(VEER_FUZZ_BUNDLE, &b, &err) != 0) {
        fprintf(stderr, "fuzz: cannot open %s: %s: %s\n", VEER_FUZZ_BUNDLE, err.field, err.message);
        abort();
    }
    return b;
}

#endif
