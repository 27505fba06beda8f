import sys

from livefilt.cli import main

sys.exit(main())
