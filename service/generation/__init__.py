"""Generators: the interface, the offline extractive default and the chat-http client."""
