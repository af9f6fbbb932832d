import sys

from objc.cli import main

sys.exit(main())
