/* Adam (Kingma & Ba, "Adam: A Method for Stochastic Optimization", ICLR 2015, Algorithm 1),
 * over one flat parameter array. The moment arrays are part of a checkpoint, so a resumed run
 * continues exactly where it stopped. Prefix veer__adam_. */
#ifndef VEER_TRAIN_ADAM_H
#define VEER_TRAIN_ADAM_H

#include <stddef.h>
#include <stdint.h>

typedef struct veer__adam {
    size_t n;
    float *m, *v;   /* first and second moment estimates (owned) */
    uint64_t t;     /* steps taken */
    float lr, beta1, beta2, eps;
} veer__adam;

/* beta1 0.9, beta2 0.999, eps 1e-8: the paper's defaults (§2). Returns 0 or VEER_ENOMEM. */
int veer__adam_init(veer__adam *a, size_t n, float lr);
void veer__adam_free(veer__adam *a);

/* One step: params -= lr * m̂ / (sqrt(v̂) + eps) with bias-corrected moments. */
void veer__adam_step(veer__adam *a, float *params, const float *grads);

#endif
