from gradwright.workflow.cli import main

raise SystemExit(main())
