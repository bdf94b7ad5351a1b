"""demur's runtime: load a bundle, run its graphs on CPU, summarise the draws,
decide accept/abstain, queue abstentions for people, and expose metrics.

Never imports torch (a test enforces it)."""
