"""Every request goes through here: the polite fetcher, robots.txt, per-host budgets and the URL
guard."""
