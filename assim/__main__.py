from assim.cli import main

raise SystemExit(main())
