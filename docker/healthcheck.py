"""The container's health check: exit 0 when GET /healthz on the local port answers 200."""

import os
import sys
import urllib.request

port = os.environ.get("EVENHAND_PORT", "8000")
try:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/healthz", timeout=4) as response:
        sys.exit(0 if response.status == 200 else 1)
except OSError:
    sys.exit(1)
