import sys

from waneguide_cli.main import main

sys.exit(main())
