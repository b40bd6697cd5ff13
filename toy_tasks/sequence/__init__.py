"""The enumerable sequence task: its responses, session, policy, methods and reward."""
