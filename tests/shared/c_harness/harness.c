/*
 * Prints every form of a generated calibration header for each code SPAN_MIN .. SPAN_MAX:
 *   code  float_is_nan  value_f (%.9g: exact for a float)  value_milli  lut_milli
 * Forms a header lacks print as 0. Built by tests/shared/test_exports.py with
 *   -DSPAN_MIN=.. -DSPAN_MAX=.. -I<dir of calibration.h>; the header's prefix is "cal".
 */
#include <math.h>
#include <stdio.h>
#include <stdint.h>

#include "calibration.h"

int main(void)
{
    int64_t code;
    for (code = SPAN_MIN; code <= SPAN_MAX; ++code) {
        int32_t reading = (int32_t)code;
        double value_f = 0.0;
        long milli = 0;
        long lut = (long)cal_lut_milli(reading);
#if CAL_HAS_FLOAT_FORM
        value_f = (double)cal_to_value_f(reading);
#endif
#if CAL_HAS_INTEGER_FORM
        milli = (long)cal_to_value_milli(reading);
#endif
        printf("%ld %d %.9g %ld %ld\n", (long)reading, isnan(value_f) ? 1 : 0,
               isnan(value_f) ? 0.0 : value_f, milli, lut);
    }
    return 0;
}
