"""The console: server-rendered pages for admins and auditors (docs/console.md)."""
