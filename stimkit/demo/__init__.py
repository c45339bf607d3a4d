"""The bundled scenario: original example scores, a rendered session, the demo run."""
