import sys

from treewright.cli import main

sys.exit(main())
