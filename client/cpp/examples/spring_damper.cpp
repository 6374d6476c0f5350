// spring_damper: calibrates the stiffness k and damping coefficient c of a
// spring–damper element from an invented bench test, through sluice.
//
// The bench drives the element with a sinusoidal displacement
// x(t) = A sin(2 pi f t) at five frequencies and records the force from a
// load cell, F = k x + c x' + noise (noise sd sigma = 4 N). The model is
// linear in (k, c), so with Gaussian priors the posterior is Gaussian and
// its mean and covariance have a closed form (the normal equations), which
// this program prints beside the sampled figures. Parameters are sampled
// in engineering units scaled to order one: theta = (k / 100 N/m, c / 5 N s/m).
//
// Kernel "mala" (Metropolis-adjusted Langevin) asks the gradient and the
// log density; both are exact here. The draws callback keeps every draw to
// report the damping ratio zeta = c / (2 sqrt(k m)) of a 2 kg mass on the
// element, which the server's summary cannot give.
//
//   spring_damper --target 127.0.0.1:7070 [--chains 8] [--draws 1500]
//                 [--burn-in 500] [--seed 11] [--check]
//                 [--ca ca.pem [--cert client.pem --key client-key.pem]]
//                 [--token-file token.txt]
//
// --ca connects with TLS trusting that authority, --cert and --key add a
// client certificate (mutual TLS), --token-file sends the bearer token the
// file holds.
//
// With --check the program exits 1 unless each sampled posterior mean lies
// within 5 Monte Carlo standard errors of the closed-form mean (MCSE from the
// server's final bulk-ESS: sd / sqrt(ESS)); 5 standard errors is a two-sided
// normal tail of about 6e-7.
#include <sluice/client.hpp>

#include <algorithm>
#include <cmath>
#include <cstdint>
#include <cstdio>
#include <cstdlib>
#include <cstring>
#include <string>
#include <vector>

namespace {

constexpr double kPi = 3.14159265358979323846;

// One load-cell reading: time, imposed displacement and velocity, force.
struct Reading {
  double x, v, force;
};

// SplitMix64 and Box–Muller: a small deterministic generator, so the
// invented data are the same on every machine.
struct Rng {
  std::uint64_t s;
  std::uint64_t next() {
    std::uint64_t z = (s += 0x9e3779b97f4a7c15ULL);
    z = (z ^ (z >> 30)) * 0xbf58476d1ce4e5b9ULL;
    z = (z ^ (z >> 27)) * 0x94d049bb133111ebULL;
    return z ^ (z >> 31);
  }
  double uniform() { return (static_cast<double>(next() >> 11) + 0.5) / 9007199254740992.0; }
  double normal() { return std::sqrt(-2 * std::log(uniform())) * std::cos(2 * kPi * uniform()); }
};

// The bench test, invented: true k = 1180 N/m, c = 31.5 N s/m.
std::vector<Reading> bench_test() {
  const double k = 1180, c = 31.5, amplitude = 0.012, sigma = 4.0;
  const double freqs[] = {0.5, 1.0, 2.0, 3.5, 5.0};
  Rng rng{20261202};
  std::vector<Reading> out;
  for (double f : freqs) {
    const double w = 2 * kPi * f;
    for (int i = 0; i < 12; ++i) {
      const double t = (i + 0.25) / (12 * f);  // 12 readings over one period
      const double x = amplitude * std::sin(w * t), v = amplitude * w * std::cos(w * t);
      out.push_back({x, v, k * x + c * v + sigma * rng.normal()});
    }
  }
  return out;
}

// The statistical model in theta = (k/100, c/5): force = 100 theta0 x +
// 5 theta1 v + N(0, sigma^2); priors k ~ N(1000, 300^2), c ~ N(30, 20^2),
// i.e. theta0 ~ N(10, 3^2), theta1 ~ N(6, 4^2).
struct Model {
  std::vector<Reading> data;
  double sigma = 4.0;
  double prior_mean[2] = {10, 6}, prior_sd[2] = {3, 4};

  // Design row of one reading in theta units.
  static void design(const Reading& r, double a[2]) {
    a[0] = 100 * r.x;
    a[1] = 5 * r.v;
  }

  // Log posterior (up to a constant) and its gradient at theta.
  double log_density(const double* th, double* grad) const {
    double lp = 0, g0 = 0, g1 = 0;
    for (const Reading& r : data) {
      double a[2];
      design(r, a);
      const double resid = r.force - (a[0] * th[0] + a[1] * th[1]);
      lp -= 0.5 * resid * resid / (sigma * sigma);
      g0 += a[0] * resid / (sigma * sigma);
      g1 += a[1] * resid / (sigma * sigma);
    }
    for (int j = 0; j < 2; ++j) {
      const double z = (th[j] - prior_mean[j]) / prior_sd[j];
      lp -= 0.5 * z * z;
    }
    g0 -= (th[0] - prior_mean[0]) / (prior_sd[0] * prior_sd[0]);
    g1 -= (th[1] - prior_mean[1]) / (prior_sd[1] * prior_sd[1]);
    if (grad != nullptr) {
      grad[0] = g0;
      grad[1] = g1;
    }
    return lp;
  }

  // Closed-form posterior (normal equations): precision P = A'A/s^2 +
  // diag(1/prior_sd^2), mean = P^-1 (A'F/s^2 + prior_mean/prior_sd^2).
  void exact(double mean[2], double cov[2][2]) const {
    double p[2][2] = {{0, 0}, {0, 0}}, b[2] = {0, 0};
    for (const Reading& r : data) {
      double a[2];
      design(r, a);
      for (int i = 0; i < 2; ++i) {
        b[i] += a[i] * r.force / (sigma * sigma);
        for (int j = 0; j < 2; ++j) p[i][j] += a[i] * a[j] / (sigma * sigma);
      }
    }
    for (int i = 0; i < 2; ++i) {
      p[i][i] += 1 / (prior_sd[i] * prior_sd[i]);
      b[i] += prior_mean[i] / (prior_sd[i] * prior_sd[i]);
    }
    const double det = p[0][0] * p[1][1] - p[0][1] * p[1][0];
    cov[0][0] = p[1][1] / det;
    cov[1][1] = p[0][0] / det;
    cov[0][1] = cov[1][0] = -p[0][1] / det;
    mean[0] = cov[0][0] * b[0] + cov[0][1] * b[1];
    mean[1] = cov[1][0] * b[0] + cov[1][1] * b[1];
  }
};

double quantile(std::vector<double> v, double q) {
  std::sort(v.begin(), v.end());
  const double pos = q * (v.size() - 1);
  const std::size_t i = static_cast<std::size_t>(pos);
  return i + 1 < v.size() ? v[i] + (pos - i) * (v[i + 1] - v[i]) : v[i];
}

void usage() {
  std::fprintf(stderr,
               "usage: spring_damper --target HOST:PORT [--chains N] [--draws N] [--burn-in N] [--seed N] [--check]\n"
               "                     [--ca FILE [--cert FILE --key FILE]] [--token-file FILE]\n");
  std::exit(2);
}

}  // namespace

int main(int argc, char** argv) {
  std::string target;
  int chains = 8;
  long draws = 1500, burn_in = 500;
  unsigned long long seed = 11;
  bool check = false;
  sluice::Security security;
  for (int i = 1; i < argc; ++i) {
    const std::string a = argv[i];
    auto value = [&]() -> const char* {
      if (i + 1 >= argc) usage();
      return argv[++i];
    };
    if (a == "--target") target = value();
    else if (a == "--chains") chains = std::atoi(value());
    else if (a == "--draws") draws = std::atol(value());
    else if (a == "--burn-in") burn_in = std::atol(value());
    else if (a == "--seed") seed = std::strtoull(value(), nullptr, 10);
    else if (a == "--check") check = true;
    else if (a == "--ca") security.ca_file = value();
    else if (a == "--cert") security.cert_file = value();
    else if (a == "--key") security.key_file = value();
    else if (a == "--token-file") security.token_file = value();
    else usage();
  }
  if (target.empty()) usage();

  Model model;
  model.data = bench_test();

  sluice::Spec spec;
  spec.dim = 2;
  spec.chains = chains;
  spec.kernel = "mala";
  spec.start = {10, 6};  // the prior mean
  spec.step = 0.05;       // adapted during burn-in
  spec.burn_in = burn_in;
  spec.draws_per_chain = draws;
  spec.seed = seed;
  spec.names = {"k_per_100", "c_per_5"};
  spec.max_message_bytes = 1 << 20;  // 8 chains x 2 values need far less

  std::vector<double> k_draws, c_draws;
  sluice::Callbacks cb;
  cb.on_draws = [&](const sluice::Draws& d) {
    for (int r = 0; r < d.rows; ++r) {
      k_draws.push_back(100 * d.values[r * d.dim]);
      c_draws.push_back(5 * d.values[r * d.dim + 1]);
    }
  };
  auto evaluate = [&](sluice::Batch& b) {
    for (int r = 0; r < b.rows; ++r) {
      const double lp = model.log_density(b.point(r), b.want_gradient ? b.gradients + r * b.dim : nullptr);
      if (b.want_log_density) b.log_densities[r] = lp;
    }
  };

  sluice::Summary s;
  try {
    s = sluice::run(sluice::connect(target, security, spec.max_message_bytes), spec, evaluate, cb);
  } catch (const sluice::Error& e) {
    std::fprintf(stderr, "spring_damper: session failed (code %d, gRPC %d): %s%s%s\n", static_cast<int>(e.code),
                 e.grpc_code, e.message.c_str(), e.field.empty() ? "" : " field ", e.field.c_str());
    return 1;
  }

  double mean[2], cov[2][2];
  model.exact(mean, cov);
  std::printf("session %s: reason: %s, %lld evaluations, %lld draws received, initial step %.4g\n",
              s.registered.session_id.c_str(), sluice::reason_name(s.reason),
              static_cast<long long>(s.progress.evaluations_used), static_cast<long long>(s.draws_received), s.registered.step);
  std::printf("%-10s %12s %12s %12s %12s %10s %8s\n", "parameter", "mean", "exact mean", "sd", "exact sd", "bulk ESS",
              "R-hat");
  bool ok = s.reason == sluice::Reason::DrawsCollected &&
            s.draws_received == static_cast<long long>(chains) * draws && s.parameters.size() == 2 &&
            s.progress.parameters.size() == 2 && static_cast<long long>(k_draws.size()) == s.draws_received;
  if (!ok) std::printf("check: unexpected summary shape\n");
  for (std::size_t j = 0; ok && j < 2; ++j) {
    const sluice::Parameter& p = s.parameters[j];
    const sluice::ParameterDiagnostics& d = s.progress.parameters[j];
    const double exact_sd = std::sqrt(cov[j][j]);
    std::printf("%-10s %12.5f %12.5f %12.5f %12.5f %10.0f %8.4f\n", p.name.c_str(), p.mean, mean[j], p.sd, exact_sd,
                d.bulk_ess, d.rhat);
    // MCSE of the mean from the server's bulk-ESS over all chains.
    const double mcse = p.sd / std::sqrt(d.bulk_ess);
    const double z = (p.mean - mean[j]) / mcse;
    const bool pass = std::isfinite(z) && d.bulk_ess > 0 && std::fabs(z) <= 5;
    std::printf("check %s: |mean - exact| / MCSE = %.2f (MCSE %.3g) %s\n", p.name.c_str(), std::fabs(z), mcse,
                pass ? "within 5" : "OUTSIDE 5");
    ok = ok && pass;
  }

  // Damping ratio of a 2 kg mass on the element, from the draws.
  std::vector<double> zeta(k_draws.size());
  for (std::size_t i = 0; i < zeta.size(); ++i) zeta[i] = c_draws[i] / (2 * std::sqrt(std::max(k_draws[i], 1e-9) * 2.0));
  if (!zeta.empty()) {
    std::printf("damping ratio of a 2 kg mass: median %.4f, 90%% interval [%.4f, %.4f]\n", quantile(zeta, 0.5),
                quantile(zeta, 0.05), quantile(zeta, 0.95));
  }
  if (check) {
    std::printf(ok ? "check passed\n" : "check FAILED\n");
    return ok ? 0 : 1;
  }
  return 0;
}
