from shardmill.cli import main

raise SystemExit(main())
