/* A straightforward single-threaded cell-list pair loop in C, doing the estimator arithmetic of
 * pairvel's engine: for every pair closer than r_max, c = (x_i - x_j).(u_i + u_j) / (2 r), then
 * num[b] += (T_i - T_j) c, den[b] += c^2, cnt[b] += 1.  Cells of side r_max / n_sub; each cell
 * visits itself (j > i) and the forward half of its neighbours within +-n_sub cells whose nearest
 * points are closer than r_max (n_sub = 1: the classic 13 forward neighbours).  Built and called by
 * bench_pairs.py as the compiled-code reference, which scans n_sub for the fastest; not part of
 * the package.
 */
#include <math.h>
#include <stdlib.h>

void cell_loop(long n, const double *x, const double *t, double r_max, long nbins, const double *edges,
               double *num, double *den, long *cnt, long n_sub)
{
    double side = r_max / n_sub;
    double lo[3] = {x[0], x[1], x[2]}, hi[3] = {x[0], x[1], x[2]};
    for (long i = 0; i < n; i++)
        for (int a = 0; a < 3; a++) {
            if (x[3 * i + a] < lo[a]) lo[a] = x[3 * i + a];
            if (x[3 * i + a] > hi[a]) hi[a] = x[3 * i + a];
        }
    long dims[3];
    for (int a = 0; a < 3; a++) dims[a] = (long)((hi[a] - lo[a]) / side) + 1;
    long ncell = dims[0] * dims[1] * dims[2];
    long *start = calloc(ncell + 1, sizeof(long)), *fill = malloc(ncell * sizeof(long));
    long *cell = malloc(n * sizeof(long)), *order = malloc(n * sizeof(long));
    for (long i = 0; i < n; i++) {
        long c[3];
        for (int a = 0; a < 3; a++) c[a] = (long)((x[3 * i + a] - lo[a]) / side);
        cell[i] = (c[0] * dims[1] + c[1]) * dims[2] + c[2];
        start[cell[i] + 1]++;
    }
    for (long c = 0; c < ncell; c++) start[c + 1] += start[c];
    for (long c = 0; c < ncell; c++) fill[c] = start[c];
    for (long i = 0; i < n; i++) order[fill[cell[i]]++] = i;
    /* sorted copies: position, unit vector, temperature */
    double *p = malloc(3 * n * sizeof(double)), *u = malloc(3 * n * sizeof(double)), *ts = malloc(n * sizeof(double));
    for (long k = 0; k < n; k++) {
        long i = order[k];
        double d = sqrt(x[3 * i] * x[3 * i] + x[3 * i + 1] * x[3 * i + 1] + x[3 * i + 2] * x[3 * i + 2]);
        for (int a = 0; a < 3; a++) { p[3 * k + a] = x[3 * i + a]; u[3 * k + a] = d > 0 ? x[3 * i + a] / d : 0; }
        ts[k] = t[i];
    }
    double r2max = r_max * r_max, width = (edges[nbins] - edges[0]) / nbins;
    for (long cx = 0; cx < dims[0]; cx++)
    for (long cy = 0; cy < dims[1]; cy++)
    for (long cz = 0; cz < dims[2]; cz++) {
        long c0 = (cx * dims[1] + cy) * dims[2] + cz;
        for (long dx = -n_sub; dx <= n_sub; dx++)
        for (long dy = -n_sub; dy <= n_sub; dy++)
        for (long dz = -n_sub; dz <= n_sub; dz++) {
            if (dx < 0 || (dx == 0 && (dy < 0 || (dy == 0 && dz < 0)))) continue;   /* forward half + self */
            long gx = labs(dx) > 1 ? labs(dx) - 1 : 0, gy = labs(dy) > 1 ? labs(dy) - 1 : 0,
                 gz = labs(dz) > 1 ? labs(dz) - 1 : 0;
            if (gx * gx + gy * gy + gz * gz >= n_sub * n_sub) continue;   /* cells too far apart */
            long jx = cx + dx, jy = cy + dy, jz = cz + dz;
            if (jx < 0 || jy < 0 || jz < 0 || jx >= dims[0] || jy >= dims[1] || jz >= dims[2]) continue;
            long c1 = (jx * dims[1] + jy) * dims[2] + jz;
            for (long i = start[c0]; i < start[c0 + 1]; i++) {
                long j0 = (c1 == c0) ? i + 1 : start[c1];
                for (long j = j0; j < start[c1 + 1]; j++) {
                    double d0 = p[3 * i] - p[3 * j], d1 = p[3 * i + 1] - p[3 * j + 1], d2 = p[3 * i + 2] - p[3 * j + 2];
                    double r2 = d0 * d0 + d1 * d1 + d2 * d2;
                    if (r2 >= r2max || r2 <= 0) continue;
                    double r = sqrt(r2);
                    if (r < edges[0]) continue;
                    long b = (long)((r - edges[0]) / width);
                    if (b >= nbins) continue;
                    double c = (d0 * (u[3 * i] + u[3 * j]) + d1 * (u[3 * i + 1] + u[3 * j + 1])
                                + d2 * (u[3 * i + 2] + u[3 * j + 2])) / (2.0 * r);
                    num[b] += (ts[i] - ts[j]) * c;
                    den[b] += c * c;
                    cnt[b] += 1;
                }
            }
        }
    }
    free(start); free(fill); free(cell); free(order); free(p); free(u); free(ts);
}
