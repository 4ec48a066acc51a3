from shrinkwrap.cli import main

raise SystemExit(main())
