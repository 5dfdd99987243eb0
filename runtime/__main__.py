from shardmill.commands.cli import main

raise SystemExit(main())
