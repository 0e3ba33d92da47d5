import sys

from adapt.cli.main import main

sys.exit(main())
