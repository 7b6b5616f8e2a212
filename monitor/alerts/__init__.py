"""The alert book (lifecycle of alerts) and the replay of rules over the history."""
