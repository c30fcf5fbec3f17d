"""An independent Modbus TCP server for the stack-light test: pymodbus with 16 coils.

    python3 tests/peers/modbus_server.py PORT
"""
import asyncio
import sys

from pymodbus.datastore import ModbusSequentialDataBlock, ModbusServerContext

try:  # pymodbus 3.10 and later
    from pymodbus.datastore import ModbusDeviceContext as DeviceContext
    def make_context(store):
        return ModbusServerContext(devices=store, single=True)
except ImportError:  # earlier 3.x
    from pymodbus.datastore import ModbusSlaveContext as DeviceContext
    def make_context(store):
        return ModbusServerContext(slaves=store, single=True)

from pymodbus.server import StartAsyncTcpServer


async def main(port):
    # pymodbus adds 1 to the 0-based address of each request: the block starts at 1.
    store = DeviceContext(co=ModbusSequentialDataBlock(1, [False] * 17))
    await StartAsyncTcpServer(context=make_context(store), address=("127.0.0.1", port))


if __name__ == "__main__":
    asyncio.run(main(int(sys.argv[1])))
