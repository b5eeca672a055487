"""The verbs of the `luforge` command, one module each; every module exposes `register(subparsers)`."""
