"""Build and check: cffi builds of emitted C, calls with canaries, and the published accuracy measures."""
