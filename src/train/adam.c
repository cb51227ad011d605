/* Adam, written as the paper's Algorithm 1 with the bias corrections folded into the step
 * size (the "more efficient order" the paper gives at the end of §2). */
#include "train/adam.h"

#include <math.h>
#include <string.h>

#include "base/base.h"

int veer__adam_init(veer__adam *a, size_t n, float lr)
{
    memset(a, 0, sizeof *a);
    a->m = veer__calloc(n ? n : 1, sizeof(float));
    a->v = veer__calloc(n ? n : 1, sizeof(float));
    if (a->m == NULL || a->v == NULL) {
        veer__adam_free(a);
        return VEER_ENOMEM;
    }
    a->n = n;
    a->lr = lr;
    a->beta1 = 0.9f;
    a->beta2 = 0.999f;
    a->eps = 1e-8f;
    return 0;
}

void veer__adam_free(veer__adam *a)
{
    veer__free(a->m);
    veer__free(a->v);
    a->m = a->v = NULL;
}

void veer__adam_step(veer__adam *a, float *params, const float *grads)
{
    a->t++;
    double c1 = 1.0 - pow(a->beta1, (double)a->t), c2 = 1.0 - pow(a->beta2, (double)a->t);
    float step = (float)(a->lr * sqrt(c2) / c1);
    float eps = (float)(a->eps * sqrt(c2)); /* epŝ of the efficient form */
    float b1 = a->beta1, b2 = a->beta2, *m = a->m, *v = a->v;
    for (size_t i = 0; i < a->n; i++) {
        float g = grads[i];
        m[i] = b1 * m[i] + (1.0f - b1) * g;
        v[i] = b2 * v[i] + (1.0f - b2) * g * g;
        params[i] -= step * m[i] / (sqrtf(v[i]) + eps);
    }
}
