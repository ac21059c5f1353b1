import sys

from raytrace.cli import main

sys.exit(main())
