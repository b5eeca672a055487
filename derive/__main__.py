"""`python -m derive` runs the luforge command line, the same as the `luforge` script."""
import sys

from derive.cli import main

sys.exit(main())
