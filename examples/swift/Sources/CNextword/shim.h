/* UNTESTED (no swiftc here): lets the module map find the public header of native/include. */
#include "nextword.h"
