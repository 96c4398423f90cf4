#include "server/core/time.h"
// time.h is header-only; this file keeps tickmark::core a real library while
// it has no other sources.
