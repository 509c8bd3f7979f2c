from stridecast.cli import main

raise SystemExit(main())
