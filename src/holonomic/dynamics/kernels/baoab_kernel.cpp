// One BAOAB-RATTLE step for fixed-norm and unconstrained parameters on the CPU,
// written in place only if the whole step is valid.
//
// The arithmetic is that of holonomic/dynamics/kernels/fused.py
// (sphere_baoab_coefficients); docs/kernels.md gives the derivation.
// Built at first use by holonomic/dynamics/kernels/native.py with the system C++
// compiler and loaded with ctypes: plain C ABI, no Python or torch headers.
//
// Two passes over memory (each one OpenMP parallel region):
//   check: per constrained vector the Gram entries of w, q = m - h scale g (and
//      the noise x) accumulated in double, the closed-form coefficients (double,
//      kept in the caller's coef array), the kinetic energy and a validity flag;
//      per chunk of an unconstrained parameter its new values computed, checked
//      and their energy summed.  Writes nothing but coef, ok and kinetic.
//   write: the new position and momentum of each parameter whose ok is 1,
//      written in place, only once every flag of the step holds.
// holonomic_step_* runs the check and, with commit = 1 and every flag of its
// parameters holding, the write in the same call (the step transaction asks for
// this only when these parameters are the whole step, so that their flags are
// all the step's flags); holonomic_write_* is the write alone, called by the
// transaction at commit otherwise.

#include <cmath>
#include <cstdint>
#include <vector>

namespace {

struct Param {
  void* w;          // position
  void* m;          // momentum
  const void* g;    // gradient
  const void* x;    // standard normal noise, or null at T = 0
  int64_t rows;     // constrained vectors (sphere) or 1 (free)
  int64_t len;      // entries per vector (sphere) or numel (free)
  int64_t row_stride, elem_stride;  // element (i, j) at i * row_stride + j * elem_stride
  int64_t sphere;   // 1: fixed norm per row, 0: unconstrained
  double h, decay, sigma, scale, wd, r2;
};

// Per work item: one sphere row, or one chunk of a free parameter.
struct Item {
  int64_t param, row, begin, end;
};

constexpr int64_t kChunk = 4096;

struct Shake {
  double lam, disc;
};

inline Shake shake_root(double norm2, double step2, double r2) {
  double c = norm2 + step2 - r2;
  double disc = norm2 * (r2 - step2);
  return {-c / (norm2 + std::sqrt(disc > 0 ? disc : 0.0)), disc};
}

// A RATTLE drift from v (|v|^2 = norm2) with tangent momentum p (|p|^2 = pn):
// v' = (1 + lam) v + s p, u = (v' - v) / s = (lam / s) v + p.  Returns lam, the
// SHAKE discriminant, |v'|^2, u.v' and |u|^2.
struct Drift {
  double lam, disc, n, u_v, uu;
};

inline Drift rattle_drift(double norm2, double pn, double s, double r2) {
  const Shake r = shake_root(norm2, s * s * pn, r2);
  const double l = r.lam;
  return {l, r.disc, (1 + l) * (1 + l) * norm2 + s * s * pn, (1 + l) * (l / s) * norm2 + s * pn,
          (l / s) * (l / s) * norm2 + pn};
}

// Coefficients of the new position (a) and momentum (c) in the basis (w, q, x),
// the squared norm of the new momentum; returns false when the step is invalid.
inline bool sphere_coefficients(double ww, double wq, double qq, double wx, double qx, double xx, bool noisy,
                                const Param& p, double* a, double* c, double* p3n) {
  const double s = 0.5 * p.h, decay = p.decay, sigma = p.sigma, r2 = p.r2;
  const double alpha = wq / ww;
  const double pp = qq - alpha * wq;
  const Drift d1 = rattle_drift(ww, pp, s, r2);
  const double lam1 = d1.lam, n1 = d1.n, u_w1 = d1.u_v, uu = d1.uu;
  const double beta = u_w1 / n1;
  const double w1[3] = {1 + lam1 - s * alpha, s, 0.0};
  const double u[2] = {lam1 / s - alpha, 1.0};
  const double pt[2] = {u[0] - beta * w1[0], u[1] - beta * w1[1]};
  const double pt2 = uu - beta * u_w1;
  double p2[3], p2n;
  if (noisy) {
    const double w1_x = w1[0] * wx + w1[1] * qx;
    const double pt_x = pt[0] * wx + pt[1] * qx;
    const double v2 = decay * decay * pt2 + 2 * decay * sigma * pt_x + sigma * sigma * xx;
    const double w1_v = sigma * w1_x;
    const double gamma = w1_v / n1;
    p2[0] = decay * pt[0] - gamma * w1[0];
    p2[1] = decay * pt[1] - gamma * w1[1];
    p2[2] = sigma;
    p2n = v2 - gamma * w1_v;
  } else {
    p2[0] = decay * pt[0];
    p2[1] = decay * pt[1];
    p2[2] = 0.0;
    p2n = decay * decay * pt2;
  }
  const Drift d2 = rattle_drift(n1, p2n, s, r2);
  const double lam2 = d2.lam, n2 = d2.n, u2_w2 = d2.u_v, u2u2 = d2.uu;
  const double beta2 = u2_w2 / n2;
  bool ok = std::isfinite(ww) && std::isfinite(wq) && std::isfinite(qq) && std::isfinite(p2n) &&
            std::isfinite(xx) && d1.disc >= 0 && d2.disc >= 0;
  for (int k = 0; k < 3; ++k) {
    a[k] = (1 + lam2) * w1[k] + s * p2[k];
    const double u2 = (lam2 / s) * w1[k] + p2[k];
    c[k] = u2 - beta2 * a[k];
    ok = ok && std::isfinite(a[k]) && std::isfinite(c[k]);
  }
  const double kin = u2u2 - beta2 * u2_w2;
  *p3n = kin > 0 ? kin : 0.0;
  return ok && a[0] > 0.5;
}

template <typename T>
struct Step {
  const Param* params;
  int64_t n_params;
  std::vector<Item> items;
  double* coef;                // 6 per item (sphere rows), owned by the caller
  std::vector<double> energy;  // per item: squared norm of the new momentum

  Step(const Param* ps, int64_t n, double* coef_out) : params(ps), n_params(n), coef(coef_out) {
    for (int64_t i = 0; i < n; ++i) {
      const Param& p = ps[i];
      if (p.sphere) {
        for (int64_t r = 0; r < p.rows; ++r) items.push_back({i, r, 0, p.len});
      } else {
        for (int64_t b = 0; b < p.len; b += kChunk) items.push_back({i, 0, b, b + kChunk < p.len ? b + kChunk : p.len});
      }
    }
    energy.assign(items.size(), 0.0);
  }

  // The sphere loops, specialised on the presence of noise and on a unit stride
  // between the entries of one vector (so that the compiler vectorises them).
  template <bool Noisy, bool Unit>
  static void gram(const T* w, const T* m, const T* g, const T* x, int64_t len, int64_t st, T kick, double* out) {
    double ww = 0, wq = 0, qq = 0, wx = 0, qx = 0, xx = 0;
    const int64_t inc = Unit ? 1 : st;
#pragma omp simd reduction(+ : ww, wq, qq, wx, qx, xx)
    for (int64_t j = 0; j < len; ++j) {
      const int64_t o = j * inc;
      const double wj = w[o], qj = static_cast<T>(m[o] - kick * g[o]);
      ww += wj * wj;
      wq += wj * qj;
      qq += qj * qj;
      if constexpr (Noisy) {
        const double xj = x[o];
        wx += wj * xj;
        qx += qj * xj;
        xx += xj * xj;
      }
    }
    out[0] = ww, out[1] = wq, out[2] = qq, out[3] = wx, out[4] = qx, out[5] = xx;
  }

  template <bool Noisy, bool Unit>
  static void combine(T* w, T* m, const T* g, const T* x, int64_t len, int64_t st, T kick, const T* c) {
    const int64_t inc = Unit ? 1 : st;
#pragma omp simd
    for (int64_t j = 0; j < len; ++j) {
      const int64_t o = j * inc;
      const T wj = w[o], qj = m[o] - kick * g[o];
      T nw = c[0] * wj + c[1] * qj, nm = c[3] * wj + c[4] * qj;
      if constexpr (Noisy) {
        nw += c[2] * x[o];
        nm += c[5] * x[o];
      }
      w[o] = nw;
      m[o] = nm;
    }
  }

  // Pointers to the first entry of an item's vector (or of the parameter).
  struct Row {
    T* w;
    T* m;
    const T* g;
    const T* x;
  };

  static Row row(const Item& it, const Param& p) {
    const int64_t at = it.row * p.row_stride;
    return {static_cast<T*>(p.w) + at, static_cast<T*>(p.m) + at, static_cast<const T*>(p.g) + at,
            p.x ? static_cast<const T*>(p.x) + at : nullptr};
  }

  bool check(int64_t k) {
    const Item& it = items[k];
    const Param& p = params[it.param];
    const auto [w, m, g, x] = row(it, p);  // read only here
    if (p.sphere) {
      const T kick = static_cast<T>(p.h * p.scale);
      const int64_t st = p.elem_stride;
      double gr[6];
      if (x) {
        (st == 1 ? gram<true, true> : gram<true, false>)(w, m, g, x, p.len, st, kick, gr);
      } else {
        (st == 1 ? gram<false, true> : gram<false, false>)(w, m, g, x, p.len, st, kick, gr);
      }
      double* c = &coef[6 * k];
      return sphere_coefficients(gr[0], gr[1], gr[2], gr[3], gr[4], gr[5], x != nullptr, p, c, c + 3, &energy[k]);
    }
    // unconstrained: q = m - h (scale g + wd w); p = decay q + sigma x; w2 = w + s q + s p
    const T h = static_cast<T>(p.h), scale = static_cast<T>(p.scale), wd = static_cast<T>(p.wd);
    const T decay = static_cast<T>(p.decay), sigma = static_cast<T>(p.sigma), s = static_cast<T>(0.5 * p.h);
    double e = 0, bad = 0;  // bad stays 0 unless an entry is not finite (inf * 0 and NaN * 0 are NaN)
#pragma omp simd reduction(+ : e, bad)
    for (int64_t j = it.begin; j < it.end; ++j) {
      const T q = m[j] - h * (scale * g[j] + wd * w[j]);
      const T pj = x ? decay * q + sigma * x[j] : decay * q;
      const T w2 = (w[j] + s * q) + s * pj;
      e += static_cast<double>(pj) * pj;
      bad += static_cast<double>(w2) * 0.0;
    }
    energy[k] = e;
    return std::isfinite(e) && bad == 0.0;
  }

  void write(int64_t k) {
    const Item& it = items[k];
    const Param& p = params[it.param];
    const auto [w, m, g, x] = row(it, p);
    if (p.sphere) {
      const T kick = static_cast<T>(p.h * p.scale);
      const int64_t st = p.elem_stride;
      T c[6];
      for (int i = 0; i < 6; ++i) c[i] = static_cast<T>(coef[6 * k + i]);
      if (x) {
        (st == 1 ? combine<true, true> : combine<true, false>)(w, m, g, x, p.len, st, kick, c);
      } else {
        (st == 1 ? combine<false, true> : combine<false, false>)(w, m, g, x, p.len, st, kick, c);
      }
      return;
    }
    const T h = static_cast<T>(p.h), scale = static_cast<T>(p.scale), wd = static_cast<T>(p.wd);
    const T decay = static_cast<T>(p.decay), sigma = static_cast<T>(p.sigma), s = static_cast<T>(0.5 * p.h);
#pragma omp simd
    for (int64_t j = it.begin; j < it.end; ++j) {
      const T q = m[j] - h * (scale * g[j] + wd * w[j]);
      const T pj = x ? decay * q + sigma * x[j] : decay * q;
      w[j] = (w[j] + s * q) + s * pj;
      m[j] = pj;
    }
  }

  // Fills coef, ok[i] (1: parameter i can be written) and kinetic[i] = |p_i|^2 / 2;
  // returns 1 when every parameter is ok.
  int check_all(int8_t* ok, double* kinetic, int64_t threads, int64_t parallel) {
    const int64_t n = static_cast<int64_t>(items.size());
    std::vector<int8_t> item_ok(items.size(), 0);
#pragma omp parallel for schedule(static) if (parallel) num_threads(static_cast<int>(threads > 0 ? threads : 1))
    for (int64_t k = 0; k < n; ++k) item_ok[k] = check(k) ? 1 : 0;
    for (int64_t i = 0; i < n_params; ++i) kinetic[i] = 0, ok[i] = 1;
    for (int64_t k = 0; k < n; ++k) {
      kinetic[items[k].param] += 0.5 * energy[k];
      if (!item_ok[k]) ok[items[k].param] = 0;
    }
    int all = 1;
    for (int64_t i = 0; i < n_params; ++i) all = all && ok[i];
    return all;
  }

  // Writes the parameters whose ok is 1 (coef from check_all).
  void write_all(const int8_t* ok, int64_t threads, int64_t parallel) {
    const int64_t n = static_cast<int64_t>(items.size());
#pragma omp parallel for schedule(static) if (parallel) num_threads(static_cast<int>(threads > 0 ? threads : 1))
    for (int64_t k = 0; k < n; ++k) {
      if (ok[items[k].param]) write(k);
    }
  }
};

template <typename T>
int check_and_commit(const Param* params, int64_t n, double* coef, int8_t* ok, double* kinetic, int64_t threads,
                     int64_t parallel, int64_t commit) {
  try {
    Step<T> step(params, n, coef);
    const int all = step.check_all(ok, kinetic, threads, parallel);
    if (all && commit) {
      step.write_all(ok, threads, parallel);
      return 2;
    }
    return all;
  } catch (...) {  // the work list could not be allocated: nothing was computed or written
    return -1;
  }
}

template <typename T>
int write_step(const Param* params, int64_t n, double* coef, const int8_t* ok, int64_t threads, int64_t parallel) {
  try {
    Step<T>(params, n, coef).write_all(ok, threads, parallel);
    return 1;
  } catch (...) {
    return -1;
  }
}

}  // namespace

extern "C" {

int holonomic_abi_version() { return 3; }

int64_t holonomic_param_size() { return static_cast<int64_t>(sizeof(Param)); }

// Work items (sphere rows and chunks of free parameters): coef needs 6 doubles per item.
int64_t holonomic_items(const Param* params, int64_t n) {
  int64_t count = 0;
  for (int64_t i = 0; i < n; ++i) count += params[i].sphere ? params[i].rows : (params[i].len + kChunk - 1) / kChunk;
  return count;
}

// Check, and with commit = 1 write when every flag holds: returns 2 when written, 1 when
// every flag holds but nothing was written (commit = 0), 0 when a flag failed (nothing
// written), -1 when out of memory (nothing written).
int holonomic_step_float(const Param* p, int64_t n, double* coef, int8_t* ok, double* kinetic, int64_t threads,
                         int64_t parallel, int64_t commit) {
  return check_and_commit<float>(p, n, coef, ok, kinetic, threads, parallel, commit);
}

int holonomic_step_double(const Param* p, int64_t n, double* coef, int8_t* ok, double* kinetic, int64_t threads,
                          int64_t parallel, int64_t commit) {
  return check_and_commit<double>(p, n, coef, ok, kinetic, threads, parallel, commit);
}

int holonomic_write_float(const Param* p, int64_t n, double* coef, const int8_t* ok, int64_t threads,
                          int64_t parallel) {
  return write_step<float>(p, n, coef, ok, threads, parallel);
}

int holonomic_write_double(const Param* p, int64_t n, double* coef, const int8_t* ok, int64_t threads,
                           int64_t parallel) {
  return write_step<double>(p, n, coef, ok, threads, parallel);
}

}  // extern "C"
