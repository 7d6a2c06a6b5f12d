from overlay.cli.main import main

raise SystemExit(main())
