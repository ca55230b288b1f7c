from fecproxy.cli import main

raise SystemExit(main())
