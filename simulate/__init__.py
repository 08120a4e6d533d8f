"""Simulate: a Modbus RTU bus with faults, written as captures together with their ground truth."""
