"""The live layer: asyncio only moves messages (MQTT intake, agents, metrics, lifespan).

All decisions are made by :class:`tocsin.pipeline.Pipeline`, the same code replay uses.
"""
