"""Report writers (JSON, Markdown, JUnit XML, HTML)."""
