// The ex-Gaussian distribution: a normal(mu, sigma) plus an independent
// exponential with mean tau, the usual model of human response times with a
// slow right tail. Used by the exgauss delay kernel and by calibration's
// maximum-likelihood fit (all arguments in seconds).
//
// Computed stably far into both tails: the exponential factor and the normal
// tail are combined in log space through the normal Mills ratio, so no
// intermediate overflows where exp(-(x-mu)/tau + sigma^2/(2 tau^2)) alone
// would. Pure functions; thread-safe.
#ifndef TICKMARK_SERVER_CORE_EX_GAUSSIAN_H_
#define TICKMARK_SERVER_CORE_EX_GAUSSIAN_H_

namespace tickmark {

// P(X <= x) = Phi(u) - exp(-(x-mu)/tau + sigma^2/(2 tau^2)) Phi(u - sigma/tau),
// u = (x - mu) / sigma. sigma, tau > 0; result in [0, 1].
double ExGaussianCdf(double x, double mu, double sigma, double tau);

// ln of the density (1/tau) exp(-(x-mu)/tau + sigma^2/(2 tau^2)) Phi(u - sigma/tau);
// finite for every finite x.
double ExGaussianLogPdf(double x, double mu, double sigma, double tau);

// The smallest x with ExGaussianCdf(x) >= p, p in (0, 1), by bisection to
// within a few ulps of x.
double ExGaussianQuantile(double p, double mu, double sigma, double tau);

}  // namespace tickmark

#endif  // TICKMARK_SERVER_CORE_EX_GAUSSIAN_H_
