import sys

from waneguide.cli.main import main

sys.exit(main())
