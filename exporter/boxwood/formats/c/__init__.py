"""The C99 target (docs/c-target.md): portable, freestanding-friendly C sources that compute
the source model's bits, for microcontrollers and for the native batch engine."""
