"""gRPC server reflection as ``grpc.reflection.v1`` next to ``v1alpha``.

grpcio-reflection serves only ``grpc.reflection.v1alpha.ServerReflection`` (v1 support
for Python is an open request upstream), while newer tools and other languages' clients
ask ``grpc.reflection.v1`` first. The two protocols are the same messages under another
package name, so the wire bytes are identical: this module registers the v1 method path
on the same servicer, with the v1alpha message classes doing the (de)serialising, and
adds a v1 copy of the reflection file to the default descriptor pool so that v1 can
describe itself as well.
"""

from __future__ import annotations

import grpc
from google.protobuf import descriptor_pb2, descriptor_pool
from grpc_reflection.v1alpha import reflection
from grpc_reflection.v1alpha import reflection_pb2 as v1alpha
from grpc_reflection.v1alpha import reflection_pb2_grpc as v1alpha_grpc

__all__ = ["SERVICE_NAME", "enable_server_reflection"]

SERVICE_NAME = "grpc.reflection.v1.ServerReflection"
_FILE = "grpc/reflection/v1/reflection.proto"


def _register_v1_file() -> None:
    """Add the v1 reflection file (v1alpha's, renamed) to the default pool, once."""
    pool = descriptor_pool.Default()
    try:
        pool.FindFileByName(_FILE)
        return
    except KeyError:
        pass
    fdp = descriptor_pb2.FileDescriptorProto()
    v1alpha.DESCRIPTOR.CopyToProto(fdp)
    fdp.name, fdp.package = _FILE, "grpc.reflection.v1"
    for svc in fdp.service:
        for m in svc.method:
            m.input_type = m.input_type.replace(".v1alpha.", ".v1.")
            m.output_type = m.output_type.replace(".v1alpha.", ".v1.")
    for msg in fdp.message_type:
        for f in msg.field:
            if f.HasField("type_name"):
                f.type_name = f.type_name.replace(".v1alpha.", ".v1.")
    pool.Add(fdp)


def enable_server_reflection(service_names, server: grpc.Server) -> None:
    """Serve reflection for ``service_names`` under both v1alpha and v1 (both reflection
    services are listed; the two names need not be in ``service_names``)."""
    _register_v1_file()
    names = tuple(service_names) + tuple(
        n for n in (reflection.SERVICE_NAME, SERVICE_NAME) if n not in service_names)
    servicer = reflection.ReflectionServicer(names)
    v1alpha_grpc.add_ServerReflectionServicer_to_server(servicer, server)
    handler = grpc.method_handlers_generic_handler(SERVICE_NAME, {
        "ServerReflectionInfo": grpc.stream_stream_rpc_method_handler(
            servicer.ServerReflectionInfo,
            request_deserializer=v1alpha.ServerReflectionRequest.FromString,
            response_serializer=v1alpha.ServerReflectionResponse.SerializeToString)})
    server.add_generic_rpc_handlers((handler,))
