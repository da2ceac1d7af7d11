from gate.cli.main import main

raise SystemExit(main())
