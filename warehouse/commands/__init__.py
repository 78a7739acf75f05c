"""The commands: one function over a Session each, declared with `registry.command` and listed in
`catalog`. One module per family: setup (init, upgrade), load, look (inventory), analyse (peek,
blocktest, versus, plan), ledger (keep, recall, recheck, retract), report (plot, export)."""
