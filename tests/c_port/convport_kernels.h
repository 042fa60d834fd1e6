/* Direct convolution kernels, included once per element type by convport.c.
 *
 * Before each inclusion define T (float or double) and FN(name) (name##_f32 / _f64).
 * Every array is channels first and seen as 3-D: unused spatial axes have length 1,
 * kernel 1, stride 1, dilation 1 and no padding. Cross-correlation, no kernel flip.
 * Sums run in T, in loop order, skipping taps that fall on padding.
 *
 *   forward      y[n,o,q]  = b[o] + sum_{c<Cg, t} w[o,c,t] x[n, g(o)Cg + c, q s + t d - lo]
 *   grad_input   gx[n,gCg+c,i] = sum_{o in group g, t, q : q s + t d - lo = i} w[o,c,t] gy[n,o,q]
 *   grad_weight  gw[o,c,t] = sum_{n,q} x[n, g(o)Cg + c, q s + t d - lo] gy[n,o,q]
 *   grad_bias    gb[o]     = sum_{n,q} gy[n,o,q]
 */

static void FN(forward)(const geom *g, const T *x, const T *w, const T *b, T *y)
{
    long Cg = g->Cin / g->G, Og = g->Cout / g->G;
    for (long n = 0; n < g->N; n++)
    for (long o = 0; o < g->Cout; o++) {
        long c0 = (o / Og) * Cg;
        for (long q0 = 0; q0 < g->O[0]; q0++)
        for (long q1 = 0; q1 < g->O[1]; q1++)
        for (long q2 = 0; q2 < g->O[2]; q2++) {
            T acc = 0;
            for (long c = 0; c < Cg; c++)
            for (long t0 = 0; t0 < g->K[0]; t0++) {
                long i0 = q0 * g->s[0] + t0 * g->d[0] - g->lo[0];
                if (i0 < 0 || i0 >= g->L[0]) continue;
                for (long t1 = 0; t1 < g->K[1]; t1++) {
                    long i1 = q1 * g->s[1] + t1 * g->d[1] - g->lo[1];
                    if (i1 < 0 || i1 >= g->L[1]) continue;
                    for (long t2 = 0; t2 < g->K[2]; t2++) {
                        long i2 = q2 * g->s[2] + t2 * g->d[2] - g->lo[2];
                        if (i2 < 0 || i2 >= g->L[2]) continue;
                        acc += w[IDX(o, c, Cg, t0, t1, t2, g->K)]
                             * x[IDX(n, c0 + c, g->Cin, i0, i1, i2, g->L)];
                    }
                }
            }
            if (b) acc += b[o];
            y[IDX(n, o, g->Cout, q0, q1, q2, g->O)] = acc;
        }
    }
}

/* Input gradient (also the transposed forward, with a bias): gy has spatial size O,
 * gx spatial size L; Cout channels in gy, Cin in gx. */
static void FN(grad_input)(const geom *g, const T *w, const T *gy, const T *b, T *gx)
{
    long Cg = g->Cin / g->G, Og = g->Cout / g->G;
    long qn[3];
    for (int a = 0; a < 3; a++) {
        qn[a] = g->O[a];
#ifdef CONVPORT_TAILBUG
        /* PLANTED BUG (bug class C01, strided tail): where the windows do not tile the
         * padded input (remainder != 0) with a stride >= 2, the last window's
         * contribution to the input gradient is dropped. */
        long e = g->d[a] * (g->K[a] - 1) + 1;
        long rem = (g->L[a] + g->lo[a] + g->hi[a] - e) % g->s[a];
        if (g->s[a] > 1 && rem != 0) qn[a] = g->O[a] - 1;
#endif
    }
    for (long n = 0; n < g->N; n++)
    for (long ci = 0; ci < g->Cin; ci++) {
        long grp = ci / Cg, c = ci % Cg;
        for (long i0 = 0; i0 < g->L[0]; i0++)
        for (long i1 = 0; i1 < g->L[1]; i1++)
        for (long i2 = 0; i2 < g->L[2]; i2++) {
            T acc = 0;
            for (long o = grp * Og; o < (grp + 1) * Og; o++)
            for (long t0 = 0; t0 < g->K[0]; t0++) {
                long u0 = i0 + g->lo[0] - t0 * g->d[0];
                if (u0 < 0 || u0 % g->s[0] || u0 / g->s[0] >= qn[0]) continue;
                for (long t1 = 0; t1 < g->K[1]; t1++) {
                    long u1 = i1 + g->lo[1] - t1 * g->d[1];
                    if (u1 < 0 || u1 % g->s[1] || u1 / g->s[1] >= qn[1]) continue;
                    for (long t2 = 0; t2 < g->K[2]; t2++) {
                        long u2 = i2 + g->lo[2] - t2 * g->d[2];
                        if (u2 < 0 || u2 % g->s[2] || u2 / g->s[2] >= qn[2]) continue;
                        acc += w[IDX(o, c, Cg, t0, t1, t2, g->K)]
                             * gy[IDX(n, o, g->Cout, u0 / g->s[0], u1 / g->s[1], u2 / g->s[2], g->O)];
                    }
                }
            }
            if (b) acc += b[ci];
            gx[IDX(n, ci, g->Cin, i0, i1, i2, g->L)] = acc;
        }
    }
}

static void FN(grad_weight)(const geom *g, const T *x, const T *gy, T *gw)
{
    long Cg = g->Cin / g->G, Og = g->Cout / g->G;
    for (long o = 0; o < g->Cout; o++)
    for (long c = 0; c < Cg; c++)
    for (long t0 = 0; t0 < g->K[0]; t0++)
    for (long t1 = 0; t1 < g->K[1]; t1++)
    for (long t2 = 0; t2 < g->K[2]; t2++) {
        long ci = (o / Og) * Cg + c;
        T acc = 0;
        for (long n = 0; n < g->N; n++)
        for (long q0 = 0; q0 < g->O[0]; q0++) {
            long i0 = q0 * g->s[0] + t0 * g->d[0] - g->lo[0];
            if (i0 < 0 || i0 >= g->L[0]) continue;
            for (long q1 = 0; q1 < g->O[1]; q1++) {
                long i1 = q1 * g->s[1] + t1 * g->d[1] - g->lo[1];
                if (i1 < 0 || i1 >= g->L[1]) continue;
                for (long q2 = 0; q2 < g->O[2]; q2++) {
                    long i2 = q2 * g->s[2] + t2 * g->d[2] - g->lo[2];
                    if (i2 < 0 || i2 >= g->L[2]) continue;
                    acc += x[IDX(n, ci, g->Cin, i0, i1, i2, g->L)]
                         * gy[IDX(n, o, g->Cout, q0, q1, q2, g->O)];
                }
            }
        }
        gw[IDX(o, c, Cg, t0, t1, t2, g->K)] = acc;
    }
}

static void FN(grad_bias)(const geom *g, const T *gy, T *gb)
{
    long plane = g->O[0] * g->O[1] * g->O[2];
    for (long o = 0; o < g->Cout; o++) {
        T acc = 0;
        for (long n = 0; n < g->N; n++)
            for (long q = 0; q < plane; q++)
                acc += gy[(n * g->Cout + o) * plane + q];
        gb[o] = acc;
    }
}
