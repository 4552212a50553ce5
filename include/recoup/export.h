/* RC_API marks the declarations the shared library exports. The library is
 * compiled with -fvisibility=hidden, so everything without it stays
 * internal (tests/exported_symbols.py checks the installed librecoup.so). */
#ifndef RECOUP_EXPORT_H
#define RECOUP_EXPORT_H

#if defined(__GNUC__) || defined(__clang__)
#define RC_API __attribute__((visibility("default")))
#else
#define RC_API
#endif

#endif
