"""The wire contract: study protocol, requests and replies, releases that may leave a site."""
