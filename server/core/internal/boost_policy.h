// Boost.Math error policies for core (internal: only core's .cc files use it).
//
// Errors become NaN with errno set, checked by the caller, instead of
// exceptions, which must not leave core (docs/conventions.md habit 2).
#ifndef TICKMARK_SERVER_CORE_INTERNAL_BOOST_POLICY_H_
#define TICKMARK_SERVER_CORE_INTERNAL_BOOST_POLICY_H_

#include <boost/math/policies/policy.hpp>

namespace tickmark::internal {

namespace bmp = boost::math::policies;

// No exceptions; Boost's default promotion to long double inside.
using NoThrowPolicy =
    bmp::policy<bmp::domain_error<bmp::errno_on_error>, bmp::pole_error<bmp::errno_on_error>,
                bmp::overflow_error<bmp::errno_on_error>,
                bmp::evaluation_error<bmp::errno_on_error>>;

// No exceptions and double precision throughout: gamma_p is accurate to a
// few ulps without promotion and several times faster, which matters on the
// credit path.
using FastNoThrowPolicy =
    bmp::policy<bmp::domain_error<bmp::errno_on_error>, bmp::pole_error<bmp::errno_on_error>,
                bmp::overflow_error<bmp::errno_on_error>,
                bmp::evaluation_error<bmp::errno_on_error>, bmp::promote_double<false>>;

}  // namespace tickmark::internal

#endif  // TICKMARK_SERVER_CORE_INTERNAL_BOOST_POLICY_H_
