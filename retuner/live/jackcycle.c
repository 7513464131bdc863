/* The JACK backend's work in each period, in C: retuner/live/jackcycle.py loads it (cffi, ABI mode).

   JACK calls jackcycle_process() once a period on its own thread. It moves bytes only:

   * what the engine queued for each output port (a ring of records per port, filled by Python) goes
     into that port's buffer, at frame 0, until the buffer is full (the rest waits for the next period);
   * what arrived on each input port goes into one ring of records; if anything did, one write to an
     eventfd wakes the Python thread that reads the ring and hands the messages to the daemon.

   An idle period therefore runs no Python at all: it asks each port for its buffer, clears the output
   buffers (every period, before any write: the JACK MIDI API requires it) and finds no input events.

   No header of JACK's is needed: libjack's five MIDI functions come as pointers from JACK-Client's own
   handle on libjack (so the library it loaded, PipeWire's under pw-jack included, is the one used).
   A port is handed over as a pointer stored atomically in its slot; taking it away is storing NULL and
   then waiting for two periods to begin before the port is unregistered (jackcycle.py does that), so a
   period never uses a port that is gone. Each ring has one writer and one reader (single producer,
   single consumer), so its two positions need only acquire/release ordering. */

#define _POSIX_C_SOURCE 200809L   /* write(2) */

#include <stddef.h>
#include <stdint.h>
#include <stdlib.h>
#include <string.h>
#include <unistd.h>

#define SLOTS 16                  /* ports of each direction (the daemon opens one of each, a few at most) */
#define RING (1u << 16)           /* bytes in each ring: a power of two */
#define HEAD 4                    /* a record: slot (1 byte), 1 spare, size (2 bytes), then the bytes */
#define LARGEST (RING / 2 - HEAD) /* the largest event a ring takes (larger input events are dropped) */

typedef struct {                  /* libjack's jack_midi_event_t (jack/midiport.h) */
    uint32_t time;
    size_t size;
    uint8_t *buffer;
} midi_event;

typedef struct {
    void *(*port_get_buffer)(void *port, uint32_t frames);
    uint32_t (*event_count)(void *buffer);
    int (*event_get)(midi_event *event, void *buffer, uint32_t index);
    void (*clear_buffer)(void *buffer);
    int (*event_write)(void *buffer, uint32_t time, const uint8_t *data, size_t size);
} jack_calls;

typedef struct {
    uint32_t head;                /* written by the producer only */
    uint32_t tail;                /* written by the consumer only */
    uint8_t bytes[RING];
} ring;

typedef struct {
    jack_calls jack;
    int wake_fd;
    void *inputs[SLOTS];          /* a port pointer or NULL, read atomically */
    void *outputs[SLOTS];
    ring in;                      /* every input's events: JACK's thread writes, Python reads */
    ring out[SLOTS];              /* each output's events: Python writes, JACK's thread reads */
    uint64_t periods;             /* periods run */
    uint64_t dropped;             /* input events with no room in the ring, or too large */
} cycle;

static uint32_t used(const ring *r)
{
    return __atomic_load_n(&r->head, __ATOMIC_ACQUIRE) - __atomic_load_n(&r->tail, __ATOMIC_ACQUIRE);
}

static void copy_in(ring *r, uint32_t at, const uint8_t *src, uint32_t n)
{
    uint32_t i = at & (RING - 1), first = RING - i < n ? RING - i : n;
    memcpy(r->bytes + i, src, first);
    memcpy(r->bytes, src + first, n - first);
}

static void copy_out(const ring *r, uint32_t at, uint8_t *dst, uint32_t n)
{
    uint32_t i = at & (RING - 1), first = RING - i < n ? RING - i : n;
    memcpy(dst, r->bytes + i, first);
    memcpy(dst + first, r->bytes, n - first);
}

/* Append one record; 0 when done, -1 when the ring has no room (nothing is written). */
static int put(ring *r, int slot, const uint8_t *data, uint32_t size)
{
    uint32_t head = r->head, tail = __atomic_load_n(&r->tail, __ATOMIC_ACQUIRE);
    uint8_t h[HEAD] = {(uint8_t)slot, 0, (uint8_t)(size & 0xff), (uint8_t)(size >> 8)};
    if (size == 0 || size > LARGEST || RING - (head - tail) < HEAD + size)
        return -1;
    copy_in(r, head, h, HEAD);
    copy_in(r, head + HEAD, data, size);
    __atomic_store_n(&r->head, head + HEAD + size, __ATOMIC_RELEASE);
    return 0;
}

/* The next record's size (its slot in *slot), 0 when the ring is empty; it stays in the ring. */
static uint32_t peek(const ring *r, int *slot)
{
    uint8_t h[HEAD];
    if (__atomic_load_n(&r->head, __ATOMIC_ACQUIRE) == r->tail)
        return 0;
    copy_out(r, r->tail, h, HEAD);
    *slot = h[0];
    return (uint32_t)h[2] | ((uint32_t)h[3] << 8);
}

static void drop(ring *r, uint32_t size)
{
    __atomic_store_n(&r->tail, r->tail + HEAD + size, __ATOMIC_RELEASE);
}

/* ------------------------------------------------------------------ JACK's thread */

int jackcycle_process(uint32_t frames, void *arg)
{
    cycle *c = arg;
    int heard = 0;
    for (int s = 0; s < SLOTS; s++) {
        void *port = __atomic_load_n(&c->outputs[s], __ATOMIC_ACQUIRE);
        if (port == NULL)
            continue;
        void *buf = c->jack.port_get_buffer(port, frames);
        c->jack.clear_buffer(buf);
        ring *r = &c->out[s];
        uint8_t whole[LARGEST];                /* an event that wraps round the ring's end, in one piece */
        int slot;
        uint32_t size;
        while ((size = peek(r, &slot)) != 0) {
            uint32_t at = (r->tail + HEAD) & (RING - 1);
            const uint8_t *data = r->bytes + at;
            if (at + size > RING) {
                copy_out(r, at, whole, size);
                data = whole;
            }
            if (c->jack.event_write(buf, 0, data, size) != 0)
                break;                         /* no room left in this period's buffer */
            drop(r, size);
        }
    }
    for (int s = 0; s < SLOTS; s++) {
        void *port = __atomic_load_n(&c->inputs[s], __ATOMIC_ACQUIRE);
        if (port == NULL)
            continue;
        void *buf = c->jack.port_get_buffer(port, frames);
        uint32_t n = c->jack.event_count(buf);
        for (uint32_t i = 0; i < n; i++) {
            midi_event e;
            if (c->jack.event_get(&e, buf, i) != 0)
                break;
            if (e.size == 0)
                continue;
            if (put(&c->in, s, e.buffer, (uint32_t)e.size) != 0)
                __atomic_add_fetch(&c->dropped, 1, __ATOMIC_RELAXED);
            else
                heard = 1;
        }
    }
    __atomic_add_fetch(&c->periods, 1, __ATOMIC_RELEASE);
    if (heard) {
        uint64_t one = 1;
        ssize_t w = write(c->wake_fd, &one, sizeof one);   /* an eventfd: never blocks a period */
        (void)w;
    }
    return 0;
}

/* ------------------------------------------------------------------ Python's side */

void *jackcycle_new(void *const calls[5], int wake_fd)
{
    cycle *c = calloc(1, sizeof *c);
    if (c == NULL)
        return NULL;
    memcpy(&c->jack, calls, sizeof c->jack);
    c->wake_fd = wake_fd;
    return c;
}

void jackcycle_free(void *c) { free(c); }

/* Hand a port to a slot (NULL takes it away); a slot's output ring starts empty. */
void jackcycle_set(void *arg, int is_input, int slot, void *port)
{
    cycle *c = arg;
    if (!is_input && port != NULL)
        c->out[slot].head = c->out[slot].tail = 0;     /* not in JACK's reach: its port is NULL */
    __atomic_store_n(is_input ? &c->inputs[slot] : &c->outputs[slot], port, __ATOMIC_RELEASE);
}

/* Queue one event for an output port: 0 when queued, -1 when its ring has no room. */
int jackcycle_send(void *arg, int slot, const uint8_t *data, uint32_t size)
{
    cycle *c = arg;
    return put(&c->out[slot], slot, data, size);
}

/* Bytes queued for an output port and not yet written to its buffer. */
uint32_t jackcycle_queued(void *arg, int slot)
{
    cycle *c = arg;
    return used(&c->out[slot]);
}

/* The next input event: its size (its input's slot in *slot), 0 when none is waiting. An event larger
   than room is dropped and counted. */
uint32_t jackcycle_take(void *arg, uint8_t *into, uint32_t room, int *slot)
{
    cycle *c = arg;
    uint32_t size;
    while ((size = peek(&c->in, slot)) != 0) {
        if (size <= room) {
            copy_out(&c->in, c->in.tail + HEAD, into, size);
            drop(&c->in, size);
            return size;
        }
        drop(&c->in, size);
        __atomic_add_fetch(&c->dropped, 1, __ATOMIC_RELAXED);
    }
    return 0;
}

uint64_t jackcycle_periods(void *arg)
{
    cycle *c = arg;
    return __atomic_load_n(&c->periods, __ATOMIC_ACQUIRE);
}

uint64_t jackcycle_dropped(void *arg)
{
    cycle *c = arg;
    return __atomic_load_n(&c->dropped, __ATOMIC_RELAXED);
}
