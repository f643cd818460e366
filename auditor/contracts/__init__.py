"""Contracts: a contract's rules judged on a panel (and across a wave boundary), and drafted from one."""
