"""``python -m service.cli``: the ``sealfold`` command without the installed script."""

from service.cli.main import main

raise SystemExit(main())
