"""Bridges between the plant's buses and posteriord's ZeroMQ sockets, each its own process.

``opcua_in`` reads input tags (and lab results) from an OPC UA server onto the feed;
``opcua_out`` serves the predictions as an OPC UA server for the operator screens; ``mqtt``
carries feed and predictions over an MQTT broker; ``labfolder`` reads CSV files of lab results
dropped in a folder. The optional libraries (asyncua, aiomqtt) are imported by the bridge that
needs them only, so the core install runs without them.
"""
