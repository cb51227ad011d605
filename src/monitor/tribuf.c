/* A triple buffer: one writer hands its latest value to readers without either side waiting.
 *
 * Key choice: of three slots the writer owns one (back), the readers own one (front), and the
 * third (middle) is exchanged atomically with a "fresh" bit. The writer fills back, then swaps
 * it into the middle; a reader swaps front with the middle only when the middle is fresh. A slot
 * is therefore never written and read at once, and the exchange's acquire-release ordering makes
 * the slot's contents visible to the thread that receives it.
 */
#include "monitor.h"

#define VEER__TRIBUF_FRESH 4u

int veer__tribuf_init(veer__tribuf *t, void *a, void *b, void *c)
{
    t->slot[0] = a;
    t->slot[1] = b;
    t->slot[2] = c;
    t->back = 0;
    atomic_init(&t->middle, 1u); /* not fresh: readers keep their front until a publish */
    t->front = 2;
    return pthread_mutex_init(&t->read_lock, NULL) == 0 ? 0 : VEER_ENOMEM;
}

void veer__tribuf_destroy(veer__tribuf *t)
{
    pthread_mutex_destroy(&t->read_lock);
}

void *veer__tribuf_back(veer__tribuf *t)
{
    return t->slot[t->back];
}

void veer__tribuf_publish(veer__tribuf *t)
{
    unsigned old =
        atomic_exchange_explicit(&t->middle, t->back | VEER__TRIBUF_FRESH, memory_order_acq_rel);
    t->back = old & 3u;
}

const void *veer__tribuf_read_begin(veer__tribuf *t)
{
    pthread_mutex_lock(&t->read_lock);
    if (atomic_load_explicit(&t->middle, memory_order_acquire) & VEER__TRIBUF_FRESH) {
        unsigned old = atomic_exchange_explicit(&t->middle, t->front, memory_order_acq_rel);
        t->front = old & 3u;
    }
    return t->slot[t->front];
}

void veer__tribuf_read_end(veer__tribuf *t)
{
    pthread_mutex_unlock(&t->read_lock);
}
