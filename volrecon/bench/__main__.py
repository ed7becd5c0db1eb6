"""``python -m volrecon.bench``."""

import sys

from volrecon.bench import main

sys.exit(main())
