"""``python -m treewise.cli``: the ``treewise`` command."""

from __future__ import annotations

from treewise.cli.commands import main

raise SystemExit(main())
