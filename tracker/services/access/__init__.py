"""Access: accounts and roles, sign-in, the audit trail and backups.

Entry points: :mod:`.accounts` (users, passwords, roles), :mod:`.permissions` (what each role may do),
:mod:`.audit` (the hash-chained audit trail), :mod:`.backup` (backup and restore).
"""
