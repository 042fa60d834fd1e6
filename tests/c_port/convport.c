/* convport: direct convolution in C, served over the cwire/1 protocol.
 *
 *   cc -O2 -std=c99 -o convport convport.c -lm
 *   cc -O2 -std=c99 -DCONVPORT_TAILBUG -o convport_tailbug convport.c -lm   (planted bug)
 *   cc -O2 -std=c99 -DCONVPORT_FAULTS ...   (test build: forward with groups > 1 dies of
 *   SIGSEGV, backward with a batch >= 2 prints a debug line on stdout)
 *
 * Forward, input / weight / bias gradients and the transposed convolution (the input
 * gradient of the matching convolution plus the bias), float32 and float64, 1-3
 * spatial axes, stride, asymmetric and negative padding, dilation, groups, bias,
 * channels first. Products and sums in the dtype of the case (ErrorModel "direct").
 * The protocol is documented in docs/wire-protocol.md: stdin carries requests,
 * stdout replies and nothing else, stderr is free for logs.
 */
#define _POSIX_C_SOURCE 200809L
#include <fcntl.h>
#include <signal.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <sys/mman.h>
#include <unistd.h>

#ifdef CONVPORT_TAILBUG
#define VERSION "1.0+tailbug"
#elif defined(CONVPORT_FAULTS)
#define VERSION "1.0+faults"
#else
#define VERSION "1.0"
#endif

typedef struct {
    long N, Cin, Cout, G;
    long L[3], K[3], O[3], s[3], d[3], lo[3], hi[3];
} geom;

#define IDX(n, c, C, a, b, e, S) \
    ((((((n) * (C) + (c)) * (S)[0] + (a)) * (S)[1] + (b)) * (S)[2]) + (e))

#define T float
#define FN(name) name##_f32
#include "convport_kernels.h"
#undef T
#undef FN
#define T double
#define FN(name) name##_f64
#include "convport_kernels.h"
#undef T
#undef FN

/* ---- the cwire/1 side ------------------------------------------------------------ */

static const char HELLO[] =
    "{\"type\":\"hello\",\"protocol\":\"cwire/1\",\"name\":\"convport\",\"version\":\"" VERSION "\","
    "\"carriers\":[\"inline\",\"region\"],\"capabilities\":{\"ndims\":[1,2,3],"
    "\"dtypes\":[\"float32\",\"float64\"],\"layouts\":[\"channels_first\"],"
    "\"padding\":[\"symmetric\",\"asymmetric\",\"negative\"],"
    "\"passes\":[\"forward\",\"backward\",\"transposed\"],\"stride\":true,\"dilation\":true,"
    "\"groups\":true,\"bias\":true,\"zero_batch\":true,\"output_padding\":true,"
    "\"deterministic\":true,\"ieee_special\":true,\"max_elements\":null,"
    "\"error_model\":{\"accumulate\":null,\"product\":null,\"operand\":null,\"output\":null,"
    "\"algorithm\":\"direct\",\"block\":null,\"note\":\"direct loops; products and sums in "
    "the dtype of the case\"}}}";

#define MAXARR 8
typedef struct { char name[16], dtype[16]; int rank; long shape[6]; long nbytes, offset; void *data; } array;

static unsigned char *region = NULL;
static long region_size = 0;
static int region_fd = -1;

static int read_full(void *buf, size_t n) {           /* 1 ok, 0 EOF at once, -1 short */
    size_t got = 0;
    while (got < n) {
        ssize_t r = read(0, (char *)buf + got, n - got);
        if (r <= 0) return got == 0 ? 0 : -1;
        got += (size_t)r;
    }
    return 1;
}

static void write_full(const void *buf, size_t n) {
    size_t put = 0;
    while (put < n) {
        ssize_t r = write(1, (const char *)buf + put, n - put);
        if (r <= 0) exit(3);
        put += (size_t)r;
    }
}

/* A JSON reader just large enough for request headers. */
static const char *ws(const char *p) { while (*p == ' ' || *p == '\n' || *p == '\t' || *p == '\r') p++; return p; }

static const char *skip(const char *p) {
    p = ws(p);
    if (*p == '"') {
        for (p++; *p && *p != '"'; p++) if (*p == '\\' && p[1]) p++;
        return *p ? p + 1 : p;
    }
    if (*p == '{' || *p == '[') {
        char close = *p == '{' ? '}' : ']';
        p = ws(p + 1);
        if (*p == close) return p + 1;
        for (;;) {
            if (close == '}') { p = ws(skip(p)); if (*p != ':') return p; p++; }
            p = ws(skip(p));
            if (*p == ',') { p++; continue; }
            return *p == close ? p + 1 : p;
        }
    }
    while (*p && !strchr(",:}] \n\t\r", *p)) p++;
    return p;
}

static const char *get(const char *obj, const char *key) {   /* value of key, or NULL */
    const char *p = ws(obj);
    size_t kl = strlen(key);
    if (*p != '{') return NULL;
    for (p = ws(p + 1); *p == '"'; ) {
        const char *k = p + 1, *e = skip(p);
        int match = (size_t)(e - 1 - k) == kl && !strncmp(k, key, kl);
        p = ws(e);
        if (*p != ':') return NULL;
        p = ws(p + 1);
        if (match) return p;
        p = ws(skip(p));
        if (*p != ',') return NULL;
        p = ws(p + 1);
    }
    return NULL;
}

static long num(const char *p, long dflt) { return p && (*p == '-' || (*p >= '0' && *p <= '9')) ? strtol(p, NULL, 10) : dflt; }

static int ints(const char *p, long *out, int max) {        /* flattens nested lists */
    int n = 0, depth = 0;
    if (!p || *p != '[') return -1;
    for (; *p; p++) {
        if (*p == '[') depth++;
        else if (*p == ']') { if (--depth == 0) return n; }
        else if (*p == '-' || (*p >= '0' && *p <= '9')) {
            char *end;
            long v = strtol(p, &end, 10);
            if (n < max) out[n] = v;
            n++;
            p = end - 1;
        }
    }
    return -1;
}

static void str(const char *p, char *out, size_t n) {
    size_t i = 0;
    if (p && *p == '"') for (p++; *p && *p != '"' && i + 1 < n; p++) out[i++] = *p;
    out[i] = 0;
}

static void put_u32(unsigned char *b, uint32_t v) { b[0] = v; b[1] = v >> 8; b[2] = v >> 16; b[3] = v >> 24; }

static void send_msg(const char *header, array *outs, int nout) {
    unsigned char prefix[8] = {'C', 'W', '/', '1'};
    put_u32(prefix + 4, (uint32_t)strlen(header));
    write_full(prefix, 8);
    write_full(header, strlen(header));
    for (int i = 0; i < nout; i++)
        if (outs[i].offset < 0 && outs[i].nbytes) write_full(outs[i].data, (size_t)outs[i].nbytes);
}

static void send_error(long id, const char *message) {
    char h[512];
    snprintf(h, sizeof h, "{\"type\":\"error\",\"id\":%ld,\"message\":\"%s\",\"arrays\":[]}", id, message);
    send_msg(h, NULL, 0);
}

static int map_region(const char *path, long size) {
    if (path) {
        if (region_fd >= 0) close(region_fd);
        region_fd = open(path, O_RDWR);
        if (region_fd < 0) return -1;
    }
    if (region) munmap(region, (size_t)region_size);
    region = NULL;
    region_size = 0;
    if (size <= 0) return 0;
    void *m = mmap(NULL, (size_t)size, PROT_READ | PROT_WRITE, MAP_SHARED, region_fd, 0);
    if (m == MAP_FAILED) return -1;
    region = m;
    region_size = size;
    return 0;
}

/* ---- one call ----------------------------------------------------------------------- */

static array *find(array *a, int n, const char *name) {
    for (int i = 0; i < n; i++) if (!strcmp(a[i].name, name)) return &a[i];
    return NULL;
}

static const char *setup(geom *g, const char *method, const char *params, array *x, array *w,
                         array *b, int *nd) {
    long st[3], dl[3], pd[6], op[3];
    char layout[32];
    *nd = x->rank - 2;
    if (*nd < 1 || *nd > 3) return "x must have 3 to 5 axes (N, C, 1-3 spatial)";
    if (w->rank != x->rank) return "w must have as many axes as x";
    if (strcmp(x->dtype, w->dtype) || (b && strcmp(b->dtype, x->dtype))) return "x, w and b must share a dtype";
    if (strcmp(x->dtype, "float32") && strcmp(x->dtype, "float64")) return "convport computes float32 and float64 only";
    str(get(params, "layout"), layout, sizeof layout);
    if (strcmp(layout, "channels_first")) return "convport takes channels_first only";
    if (ints(get(params, "stride"), st, 3) != *nd || ints(get(params, "dilation"), dl, 3) != *nd
        || ints(get(params, "padding"), pd, 6) != 2 * *nd || ints(get(params, "output_padding"), op, 3) != *nd)
        return "params stride, dilation, output_padding (one per axis) and padding (pairs) are required";
    g->G = num(get(params, "groups"), 0);
    if (g->G < 1) return "params groups must be >= 1";
    int tr = !strcmp(method, "transposed");
    g->N = x->shape[0];
    long cx = x->shape[1];
    if (tr) { g->Cout = cx; g->Cin = w->shape[1] * g->G; if (w->shape[0] != cx) return "w.shape[0] must equal x channels"; }
    else { g->Cin = cx; g->Cout = w->shape[0]; if (w->shape[1] * g->G != cx) return "w.shape[1] * groups must equal x channels"; }
    if (g->Cin % g->G || g->Cout % g->G) return "groups must divide both channel counts";
    if (b && (b->rank != 1 || b->shape[0] != (tr ? g->Cin : g->Cout))) return "b must have one entry per output channel";
    for (int a = 0; a < 3; a++) {
        int in = a < *nd;
        long L = in ? x->shape[2 + a] : 1;
        g->K[a] = in ? w->shape[2 + a] : 1;
        g->s[a] = in ? st[a] : 1; g->d[a] = in ? dl[a] : 1;
        g->lo[a] = in ? pd[2 * a] : 0; g->hi[a] = in ? pd[2 * a + 1] : 0;
        if (g->s[a] < 1 || g->d[a] < 1 || g->K[a] < 1) return "stride, dilation and kernel sizes must be >= 1";
        long e = g->d[a] * (g->K[a] - 1) + 1;
        if (tr) {   /* conv view: gy = x (size O), gx = y (size L) */
            g->O[a] = L;
            g->L[a] = g->s[a] * (L - 1) + e + (in ? op[a] : 0) - g->lo[a] - g->hi[a];
            if (g->lo[a] < 0 || g->hi[a] < 0 || L < 1 || g->L[a] < 1) return "transposed geometry gives no output";
        } else {
            g->L[a] = L;
            if (L + g->lo[a] + g->hi[a] < e || g->lo[a] < -L || g->hi[a] < -L) return "kernel wider than the padded input";
            g->O[a] = (L + g->lo[a] + g->hi[a] - e) / g->s[a] + 1;
        }
    }
    return NULL;
}

static void out_array(array *o, const char *name, const char *dtype, long n0, long n1, const long *sp,
                      int nd, long *free_at) {
    long item = strcmp(dtype, "float32") ? 8 : 4, count = n0 * n1;
    strcpy(o->name, name); strcpy(o->dtype, dtype);
    o->shape[0] = n0; o->rank = 1;
    if (n1 >= 0) { o->shape[1] = n1; o->rank = 2 + nd; for (int a = 0; a < nd; a++) { o->shape[2 + a] = sp[a]; count *= sp[a]; } }
    else count = n0;
    o->nbytes = count * item;
    if (*free_at >= 0 && *free_at + o->nbytes <= region_size) {
        o->offset = *free_at; o->data = region + *free_at;
        *free_at = (*free_at + o->nbytes + 63) / 64 * 64;
    } else { o->offset = -1; o->data = calloc((size_t)(o->nbytes ? o->nbytes : 1), 1); }
}

static void call(long id, const char *h, array *in, int nin) {
    char method[32], hdr[2048];
    const char *params = get(h, "params");
    array *x = find(in, nin, "x"), *w = find(in, nin, "w"), *b = find(in, nin, "b"), *gy = find(in, nin, "grad_y");
    array outs[3];
    int nout = 0, nd;
    geom g;
    str(get(h, "method"), method, sizeof method);
    long free_at = get(h, "region_free") && region ? num(get(h, "region_free"), -1) : -1;
    if (strcmp(method, "forward") && strcmp(method, "backward") && strcmp(method, "transposed")) { send_error(id, "unknown method"); return; }
    if (!params || !x || !w || (!strcmp(method, "backward") && !gy)) { send_error(id, "request lacks params, x, w or grad_y"); return; }
    const char *bad = setup(&g, method, params, x, w, b, &nd);
    int f32 = !strcmp(x->dtype, "float32");
    if (!bad && gy) {
        int ok = gy->rank == x->rank && gy->shape[0] == g.N && gy->shape[1] == g.Cout && !strcmp(gy->dtype, x->dtype);
        for (int a = 0; a < nd; a++) ok = ok && gy->shape[2 + a] == g.O[a];
        if (!ok) bad = "grad_y must have the shape and dtype of y";
    }
    if (bad) { send_error(id, bad); return; }
#ifdef CONVPORT_FAULTS
    if (!strcmp(method, "forward") && g.G > 1) raise(SIGSEGV);
    if (!strcmp(method, "backward") && g.N >= 2) { fputs("debug: backward\n", stdout); fflush(stdout); }
#endif
    if (!strcmp(method, "forward")) {
        out_array(&outs[nout++], "y", x->dtype, g.N, g.Cout, g.O, nd, &free_at);
        if (f32) forward_f32(&g, x->data, w->data, b ? b->data : NULL, outs[0].data);
        else forward_f64(&g, x->data, w->data, b ? b->data : NULL, outs[0].data);
    } else if (!strcmp(method, "transposed")) {
        out_array(&outs[nout++], "y", x->dtype, g.N, g.Cin, g.L, nd, &free_at);
        if (f32) grad_input_f32(&g, w->data, x->data, b ? b->data : NULL, outs[0].data);
        else grad_input_f64(&g, w->data, x->data, b ? b->data : NULL, outs[0].data);
    } else {
        out_array(&outs[nout++], "grad_x", x->dtype, g.N, g.Cin, g.L, nd, &free_at);
        out_array(&outs[nout++], "grad_w", x->dtype, g.Cout, g.Cin / g.G, g.K, nd, &free_at);
        if (b) out_array(&outs[nout++], "grad_b", x->dtype, g.Cout, -1, NULL, nd, &free_at);
        if (f32) {
            grad_input_f32(&g, w->data, gy->data, NULL, outs[0].data);
            grad_weight_f32(&g, x->data, gy->data, outs[1].data);
            if (b) grad_bias_f32(&g, gy->data, outs[2].data);
        } else {
            grad_input_f64(&g, w->data, gy->data, NULL, outs[0].data);
            grad_weight_f64(&g, x->data, gy->data, outs[1].data);
            if (b) grad_bias_f64(&g, gy->data, outs[2].data);
        }
    }
    int n = snprintf(hdr, sizeof hdr, "{\"type\":\"result\",\"id\":%ld,\"arrays\":[", id);
    for (int i = 0; i < nout; i++) {
        n += snprintf(hdr + n, sizeof hdr - n, "%s{\"name\":\"%s\",\"dtype\":\"%s\",\"shape\":[",
                      i ? "," : "", outs[i].name, outs[i].dtype);
        for (int a = 0; a < outs[i].rank; a++) n += snprintf(hdr + n, sizeof hdr - n, "%s%ld", a ? "," : "", outs[i].shape[a]);
        n += snprintf(hdr + n, sizeof hdr - n, "],\"nbytes\":%ld", outs[i].nbytes);
        if (outs[i].offset >= 0) n += snprintf(hdr + n, sizeof hdr - n, ",\"offset\":%ld", outs[i].offset);
        n += snprintf(hdr + n, sizeof hdr - n, "}");
    }
    snprintf(hdr + n, sizeof hdr - n, "]}");
    send_msg(hdr, outs, nout);
    for (int i = 0; i < nout; i++) if (outs[i].offset < 0) free(outs[i].data);
}

/* ---- the loop ------------------------------------------------------------------------- */

int main(void) {
    send_msg(HELLO, NULL, 0);
    for (;;) {
        unsigned char prefix[8];
        int r = read_full(prefix, 8);
        if (r == 0) return 0;                              /* end of input: done */
        if (r < 0 || memcmp(prefix, "CW/1", 4)) { fprintf(stderr, "convport: bad message prefix\n"); return 2; }
        uint32_t hl = prefix[4] | prefix[5] << 8 | prefix[6] << 16 | (uint32_t)prefix[7] << 24;
        char *h = malloc(hl + 1);
        if (!h || read_full(h, hl) != 1) { fprintf(stderr, "convport: short header\n"); return 2; }
        h[hl] = 0;
        char type[32];
        str(get(h, "type"), type, sizeof type);
        long id = num(get(h, "id"), 0);
        const char *rs = get(h, "region_size");
        if (rs && region && num(rs, 0) != region_size && map_region(NULL, num(rs, 0))) { fprintf(stderr, "convport: cannot remap the region\n"); return 2; }
        array in[MAXARR];
        int nin = 0;
        const char *p = get(h, "arrays");
        for (p = p && *p == '[' ? ws(p + 1) : ""; *p == '{' && nin < MAXARR; nin++) {
            array *a = &in[nin];
            str(get(p, "name"), a->name, sizeof a->name);
            str(get(p, "dtype"), a->dtype, sizeof a->dtype);
            a->rank = ints(get(p, "shape"), a->shape, 6);
            a->nbytes = num(get(p, "nbytes"), 0);
            a->offset = num(get(p, "offset"), -1);
            if (a->rank < 0 || a->rank > 6) { fprintf(stderr, "convport: bad shape\n"); return 2; }
            p = ws(skip(p));
            if (*p == ',') p = ws(p + 1);
        }
        for (int i = 0; i < nin; i++) {
            array *a = &in[i];
            if (a->offset >= 0) {
                if (!region || a->offset + a->nbytes > region_size) { fprintf(stderr, "convport: array outside the region\n"); return 2; }
                a->data = region + a->offset;
            } else {
                a->data = malloc((size_t)(a->nbytes ? a->nbytes : 1));
                if (!a->data || (a->nbytes && read_full(a->data, (size_t)a->nbytes) != 1)) { fprintf(stderr, "convport: short payload\n"); return 2; }
            }
        }
        if (!strcmp(type, "region")) {
            char path[4096];
            str(get(h, "path"), path, sizeof path);
            if (map_region(path, num(get(h, "size"), 0))) send_error(id, "cannot map the region");
            else send_msg("{\"type\":\"region-ok\",\"arrays\":[]}", NULL, 0);
        } else if (!strcmp(type, "call")) {
            call(id, h, in, nin);
        } else {
            send_error(id, "unknown message type");
        }
        for (int i = 0; i < nin; i++) if (in[i].offset < 0) free(in[i].data);
        free(h);
    }
}
