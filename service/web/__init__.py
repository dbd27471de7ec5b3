"""Server-rendered HTML pages: the rankings overview and one page per sorbent."""
