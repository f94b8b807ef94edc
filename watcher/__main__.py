from watcher.cli import main

raise SystemExit(main())
