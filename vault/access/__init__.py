"""The one door: the only holder of keys and blob decryptors. Every read of participant
plaintext takes a grant minted by the policy engine, is admitted against live consent and audited."""
