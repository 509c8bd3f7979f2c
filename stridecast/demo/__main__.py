import sys

from stridecast.demo.run import module_main

sys.exit(module_main())
