/*
 * power_peak.c - subscribe to a beamtap service's `power` topic and print
 * the strongest bearing of every block. Written from docs/protocol.md alone:
 * ZeroMQ for the socket, msgpack-c for the header, the payload read as
 * little-endian float32.
 *
 * Build (Debian/Ubuntu: apt-get install gcc libzmq3-dev libmsgpack-dev pkg-config):
 *   gcc -O2 -Wall -o power_peak power_peak.c $(pkg-config --cflags --libs libzmq msgpack)
 * Run:
 *   ./power_peak tcp://127.0.0.1:5560 [count]
 *   ./power_peak tcp://boat.local:5560 [count] --server-key service.key --key me.key_secret
 * With the two key files (ZeroMQ certificate files, as `beamtap keys` writes
 * them) the socket is a CURVE client of a secured service.
 */
#include <msgpack.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <zmq.h>

#define MAX_BEAMS 20000

static double bearing_deg[MAX_BEAMS];
static long n_bearings = 0;
static long bearing_table = -1;

/* Look a key up in a msgpack map; NULL when absent. */
static const msgpack_object *map_get(const msgpack_object *map, const char *key) {
    if (map->type != MSGPACK_OBJECT_MAP) return NULL;
    size_t len = strlen(key);
    for (uint32_t i = 0; i < map->via.map.size; i++) {
        const msgpack_object *k = &map->via.map.ptr[i].key;
        if (k->type == MSGPACK_OBJECT_STR && k->via.str.size == len && memcmp(k->via.str.ptr, key, len) == 0)
            return &map->via.map.ptr[i].val;
    }
    return NULL;
}

/* Any msgpack number as a double / integer (the encoder picks the smallest type). */
static double as_double(const msgpack_object *o) {
    switch (o->type) {
    case MSGPACK_OBJECT_POSITIVE_INTEGER: return (double)o->via.u64;
    case MSGPACK_OBJECT_NEGATIVE_INTEGER: return (double)o->via.i64;
    case MSGPACK_OBJECT_FLOAT32:
    case MSGPACK_OBJECT_FLOAT64: return o->via.f64;
    default: return 0.0;
    }
}

static long long as_int(const msgpack_object *o) {
    if (o->type == MSGPACK_OBJECT_POSITIVE_INTEGER) return (long long)o->via.u64;
    if (o->type == MSGPACK_OBJECT_NEGATIVE_INTEGER) return (long long)o->via.i64;
    return (long long)as_double(o);
}

/* float32, little-endian, whatever the host's byte order. */
static float le_float(const unsigned char *p) {
    uint32_t u = (uint32_t)p[0] | ((uint32_t)p[1] << 8) | ((uint32_t)p[2] << 16) | ((uint32_t)p[3] << 24);
    float f;
    memcpy(&f, &u, sizeof f);
    return f;
}

static void on_beams(const msgpack_object *h) {
    const msgpack_object *deg = map_get(h, "power_deg");
    const msgpack_object *id = map_get(h, "beam_table");
    if (!deg || deg->type != MSGPACK_OBJECT_ARRAY || !id) return;
    n_bearings = 0;
    for (uint32_t i = 0; i < deg->via.array.size && i < MAX_BEAMS; i++) {
        const msgpack_object *pair = &deg->via.array.ptr[i];
        if (pair->type != MSGPACK_OBJECT_ARRAY || pair->via.array.size < 1) return;
        bearing_deg[n_bearings++] = as_double(&pair->via.array.ptr[0]);
    }
    bearing_table = as_int(id);
}

/* Prints the strongest beam of one power message; returns 1 if it printed a line. */
static int on_power(const msgpack_object *h, const unsigned char *payload, size_t size) {
    const msgpack_object *dtype = map_get(h, "dtype"), *shape = map_get(h, "shape");
    const msgpack_object *first = map_get(h, "first_sample"), *seq = map_get(h, "seq");
    const msgpack_object *table = map_get(h, "beam_table"), *gap = map_get(h, "gap");
    if (!dtype || dtype->type != MSGPACK_OBJECT_STR || dtype->via.str.size != 3 ||
        memcmp(dtype->via.str.ptr, "<f4", 3) != 0 || !shape || shape->type != MSGPACK_OBJECT_ARRAY ||
        shape->via.array.size != 2 || !first || !seq || !table) {
        fprintf(stderr, "power_peak: unexpected power header\n");
        return 0;
    }
    long long bands = as_int(&shape->via.array.ptr[0]), beams = as_int(&shape->via.array.ptr[1]);
    if (bands < 1 || beams < 1 || (size_t)(bands * beams * 4) != size) {
        fprintf(stderr, "power_peak: payload of %zu bytes does not match shape\n", size);
        return 0;
    }
    long best = 0;
    float best_db = le_float(payload);
    for (long b = 1; b < beams; b++) { /* band 0 is the first row */
        float v = le_float(payload + 4 * b);
        if (v > best_db) { best_db = v; best = b; }
    }
    int gap_flag = gap && gap->type == MSGPACK_OBJECT_BOOLEAN && gap->via.boolean;
    /* Bearings only from the beam table this message was formed with: until it arrives (it is
       published once a second and on every change), the message is skipped, not printed half. */
    if (bearing_table != as_int(table) || best >= n_bearings) return 0;
    printf("seq=%lld first_sample=%lld beam=%ld bearing_deg=%.1f power_db=%.2f gap=%d\n", as_int(seq),
           as_int(first), best, bearing_deg[best], best_db, gap_flag);
    fflush(stdout);
    return 1;
}

/* The 40-character Z85 key after `name = "` in a ZeroMQ certificate file; 0 when found. */
static int read_key(const char *path, const char *name, char out[41]) {
    FILE *f = fopen(path, "r");
    if (!f) return -1;
    char line[512];
    int found = -1;
    size_t len = strlen(name);
    while (found && fgets(line, sizeof line, f)) {
        const char *p = line;
        while (*p == ' ' || *p == '\t') p++;
        if (strncmp(p, name, len) != 0) continue;
        const char *q = strchr(p + len, '"');
        if (q && strlen(q + 1) >= 41 && q[41] == '"') {
            memcpy(out, q + 1, 40);
            out[40] = 0;
            found = 0;
        }
    }
    fclose(f);
    return found;
}

int main(int argc, char **argv) {
    const char *endpoint = "tcp://127.0.0.1:5560", *server_key = NULL, *key = NULL;
    long count = 0;
    int positional = 0;
    for (int i = 1; i < argc; i++) {
        if (strcmp(argv[i], "--server-key") == 0 && i + 1 < argc) server_key = argv[++i];
        else if (strcmp(argv[i], "--key") == 0 && i + 1 < argc) key = argv[++i];
        else if (positional++ == 0) endpoint = argv[i];
        else count = atol(argv[i]);
    }
    void *ctx = zmq_ctx_new();
    void *sub = zmq_socket(ctx, ZMQ_SUB);
    if (server_key || key) { /* CURVE client: the service's public key, our own key pair */
        char server_public[41], public[41], secret[41];
        if (!server_key || !key || read_key(server_key, "public-key", server_public) ||
            read_key(key, "public-key", public) || read_key(key, "secret-key", secret)) {
            fprintf(stderr, "power_peak: need --server-key SERVICE.key and --key YOUR.key_secret (readable "
                            "ZeroMQ certificate files)\n");
            return 2;
        }
        zmq_setsockopt(sub, ZMQ_CURVE_SERVERKEY, server_public, 40);
        zmq_setsockopt(sub, ZMQ_CURVE_PUBLICKEY, public, 40);
        zmq_setsockopt(sub, ZMQ_CURVE_SECRETKEY, secret, 40);
    }
    if (zmq_connect(sub, endpoint) != 0) {
        fprintf(stderr, "power_peak: cannot connect to %s: %s\n", endpoint, zmq_strerror(zmq_errno()));
        return 2;
    }
    zmq_setsockopt(sub, ZMQ_SUBSCRIBE, "power", 5);
    zmq_setsockopt(sub, ZMQ_SUBSCRIBE, "beams", 5);
    long printed = 0;
    while (count == 0 || printed < count) {
        zmq_msg_t part[3];
        int n = 0, more = 1;
        while (more) {
            zmq_msg_t m;
            zmq_msg_init(&m);
            if (zmq_msg_recv(&m, sub, 0) < 0) { zmq_msg_close(&m); goto done; }
            more = zmq_msg_more(&m);
            if (n < 3) part[n++] = m; else zmq_msg_close(&m);
        }
        if (n == 3) {
            msgpack_unpacked up;
            msgpack_unpacked_init(&up);
            size_t off = 0;
            if (msgpack_unpack_next(&up, zmq_msg_data(&part[1]), zmq_msg_size(&part[1]), &off) ==
                MSGPACK_UNPACK_SUCCESS) {
                const msgpack_object *v = map_get(&up.data, "v");
                if (!v || as_int(v) != 2) {
                    fprintf(stderr, "power_peak: protocol version is not 2\n");
                } else if (zmq_msg_size(&part[0]) == 5 && memcmp(zmq_msg_data(&part[0]), "beams", 5) == 0) {
                    on_beams(&up.data);
                } else if (zmq_msg_size(&part[0]) == 5 && memcmp(zmq_msg_data(&part[0]), "power", 5) == 0) {
                    printed += on_power(&up.data, zmq_msg_data(&part[2]), zmq_msg_size(&part[2]));
                }
            }
            msgpack_unpacked_destroy(&up);
        }
        for (int i = 0; i < n; i++) zmq_msg_close(&part[i]);
    }
done:
    zmq_close(sub);
    zmq_ctx_term(ctx);
    return 0;
}
