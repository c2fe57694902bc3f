"""Disclosure control: policy, the one gate, update release, privacy budget, approvals, ledger."""
