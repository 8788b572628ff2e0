#!/usr/bin/env python3
"""Example Python client for the hypsogrid gRPC service (package hypsogrid.v1).

It generates the Python stubs from the project's .proto files with grpcio-tools into a
temporary folder (nothing generated is kept in the repository), then:

1. checks the standard health service (grpc.health.v1) and lists the services through server
   reflection (grpc.reflection.v1alpha, the version grpcio-reflection speaks);
2. prints the catalogue of loaded cycles;
3. asks for an area of 1000-500 hPa thickness and 500 hPa height, reassembling the streamed
   chunks into one grid per quantity;
4. asks for a time series of 1000-500 hPa thickness at two points (every lead time).

Any failure ends the script with a non-zero exit status and a one-line message on stderr.

    python3 examples/python/client.py --target 127.0.0.1:50951

Install the packages first (scripts/install-deps puts them in target/python-venv):
    pip install -r examples/python/requirements.txt

Caution: thickness values used as rain-snow guidance are derived from model fields; they are
not a forecast or warning, thresholds must suit the local climate and terrain, and official
services and licensed forecasters decide.
"""

import argparse
import atexit
import importlib
import math
import os
import shutil
import sys
import tempfile

HERE = os.path.dirname(os.path.abspath(__file__))
DEFAULT_PROTO_DIR = os.path.normpath(os.path.join(HERE, "..", "..", "proto"))
PROTO_FILES = ["hypsogrid/v1/cycle.proto", "hypsogrid/v1/service.proto", "hypsogrid/v1/products.proto"]


def fail(message):
    print(f"client.py: error: {message}", file=sys.stderr)
    sys.exit(1)


def generate_stubs(proto_dir, out_dir):
    """Compiles the protos with grpcio-tools' bundled protoc into out_dir."""
    from grpc_tools import protoc
    import grpc_tools

    include = os.path.join(os.path.dirname(grpc_tools.__file__), "_proto")
    args = [
        "grpc_tools.protoc",
        f"-I{proto_dir}",
        f"-I{include}",
        f"--python_out={out_dir}",
        f"--grpc_python_out={out_dir}",
    ] + PROTO_FILES
    if protoc.main(args) != 0:
        fail(f"protoc could not compile {PROTO_FILES} from '{proto_dir}'")


def load_stubs(proto_dir, stub_dir):
    if stub_dir is None:
        stub_dir = tempfile.mkdtemp(prefix="hypsogrid-stubs-")
        # Generated for this run only: gone when the client exits.
        atexit.register(shutil.rmtree, stub_dir, ignore_errors=True)
        generate_stubs(proto_dir, stub_dir)
    sys.path.insert(0, stub_dir)
    pb = importlib.import_module("hypsogrid.v1.service_pb2")
    rpc = importlib.import_module("hypsogrid.v1.service_pb2_grpc")
    return pb, rpc


def list_services(channel):
    """Service names through server reflection (v1alpha)."""
    from grpc_reflection.v1alpha import reflection_pb2, reflection_pb2_grpc

    stub = reflection_pb2_grpc.ServerReflectionStub(channel)
    request = reflection_pb2.ServerReflectionRequest(list_services="")
    names = []
    for response in stub.ServerReflectionInfo(iter([request]), timeout=10):
        names.extend(s.name for s in response.list_services_response.service)
    return sorted(names)


def health_status(channel, service=""):
    from grpc_health.v1 import health_pb2, health_pb2_grpc

    stub = health_pb2_grpc.HealthStub(channel)
    response = stub.Check(health_pb2.HealthCheckRequest(service=service), timeout=10)
    return health_pb2.HealthCheckResponse.ServingStatus.Name(response.status)


def lead_label(seconds):
    return f"+{seconds // 3600}h" if seconds % 3600 == 0 else f"+{seconds}s"


def quantity_label(q):
    if q.HasField("thickness"):
        return f"thickness {q.thickness.bottom_pa / 100:g}-{q.thickness.top_pa / 100:g} hPa"
    return f"height {q.geopotential_height.pressure_pa / 100:g} hPa"


def fetch_area(stub, pb, request, metadata):
    """Streams an area answer and joins the chunks: one row-major grid per quantity."""
    latitudes, longitudes, fields, chunks = [], [], None, 0
    header = None
    for chunk in stub.QueryArea(request, metadata=metadata, timeout=60):
        if chunk.row_offset != len(latitudes):
            fail(f"area chunk {chunks} starts at row {chunk.row_offset}, expected {len(latitudes)}")
        if fields is None:
            header = chunk
            longitudes = list(chunk.longitudes_deg)
            fields = [(f.quantity, [], bytearray()) for f in chunk.fields]
        for (quantity, values, flags), part in zip(fields, chunk.fields):
            values.extend(part.values)
            flags.extend(part.flags)
        latitudes.extend(chunk.latitudes_deg)
        chunks += 1
    if header is None:
        fail("the area answer had no chunk")
    if len(latitudes) != header.total_rows:
        fail(f"area: got {len(latitudes)} rows of {header.total_rows}")
    return header, latitudes, longitudes, fields, chunks


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--target", default="127.0.0.1:50951", help="server host:port")
    parser.add_argument("--token", default=os.environ.get("HYPSOGRID_TOKEN"),
                        help="bearer token, for a server started with --auth-tokens")
    parser.add_argument("--proto-dir", default=DEFAULT_PROTO_DIR, help="folder holding hypsogrid/v1/*.proto")
    parser.add_argument("--stubs", default=None,
                        help="folder of stubs made by generate_stubs.sh (default: generate into a temporary folder)")
    parser.add_argument("--bbox", default="54,57,-44,-38", help="area box SOUTH,NORTH,WEST,EAST in degrees")
    parser.add_argument("--stride", type=int, default=2, help="keep every N-th row and column of the area")
    args = parser.parse_args()

    try:
        import grpc
    except ImportError:
        fail("grpcio is not installed: run scripts/install-deps (or pip install -r examples/python/requirements.txt)")

    pb, rpc = load_stubs(args.proto_dir, args.stubs)
    metadata = [("authorization", f"Bearer {args.token}")] if args.token else []
    south, north, west, east = (float(v) for v in args.bbox.split(","))

    with grpc.insecure_channel(args.target) as channel:
        try:
            grpc.channel_ready_future(channel).result(timeout=10)
        except grpc.FutureTimeoutError:
            fail(f"cannot connect to {args.target}")

        # 1. Health and reflection: what generic tools see.
        status = health_status(channel)
        print(f"health: {status}")
        if status != "SERVING":
            fail(f"the server at {args.target} is {status}, not SERVING")
        services = list_services(channel)
        print("services (reflection v1alpha): " + ", ".join(services))

        stub = rpc.HeightServiceStub(channel)

        # 2. Catalogue.
        catalogue = stub.GetCatalogue(pb.CatalogueRequest(), metadata=metadata, timeout=10)
        print(f"catalogue: {len(catalogue.cycles)} cycle(s), {len(catalogue.failures)} failure(s)")
        for entry in catalogue.cycles:
            d = entry.description
            leads = ", ".join(lead_label(s) for s in d.lead_times_s)
            print(f"  cycle {entry.id}: reference {d.reference_time or 'unknown'}, "
                  f"{len(d.grid.latitudes_deg)}x{len(d.grid.longitudes_deg)} grid, "
                  f"{d.members} member(s), lead times {leads}, "
                  f"heights {'ready' if entry.heights_ready else 'computing'}")
        for failure in catalogue.failures:
            print(f"  failed: {failure.source}: {failure.error}")
        if not catalogue.cycles:
            fail("the catalogue is empty")
        cycle = catalogue.cycles[0]
        leads = list(cycle.description.lead_times_s)

        # 3. Area: 1000-500 hPa thickness and 500 hPa height at the second lead time.
        quantities = [
            pb.Quantity(thickness=pb.LayerBounds(bottom_pa=100000, top_pa=50000)),
            pb.Quantity(geopotential_height=pb.HeightAtPressure(pressure_pa=50000)),
        ]
        lead = leads[1] if len(leads) > 1 else leads[0]
        request = pb.AreaRequest(
            cycle_id=cycle.id,
            time=pb.TimeSelection(lead_time_s=lead),
            quantities=quantities,
            bbox=pb.BoundingBox(south_deg=south, north_deg=north, west_deg=west, east_deg=east),
            stride=args.stride,
        )
        header, lats, lons, fields, chunks = fetch_area(stub, pb, request, metadata)
        print(f"area: cycle {header.cycle_id}, lead {lead_label(header.lead_time_s)} "
              f"(valid {header.valid_time}), {len(lats)} rows x {len(lons)} columns in {chunks} chunk(s)")
        below_bit = pb.POINT_FLAG_BELOW_GROUND
        for quantity, values, flags in fields:
            finite = [v for v in values if not math.isnan(v)]
            below = sum(1 for f in flags if f & below_bit)
            if len(values) != len(lats) * len(lons):
                fail(f"area: {quantity_label(quantity)} has {len(values)} values for {len(lats)}x{len(lons)}")
            if not finite:
                fail(f"area: {quantity_label(quantity)} has no values")
            print(f"  {quantity_label(quantity)}: min {min(finite):.1f} m, max {max(finite):.1f} m, "
                  f"{below} of {len(values)} points below ground")

        # 4. Position: a time series of 1000-500 hPa thickness at two points.
        points = [pb.GeoPoint(latitude_deg=55.4, longitude_deg=-42.9),
                  pb.GeoPoint(latitude_deg=58.65, longitude_deg=-29.4)]
        position = stub.QueryPosition(pb.PositionRequest(
            cycle_id=cycle.id,
            points=points,
            quantities=quantities[:1],
            interpolation=pb.INTERPOLATION_BILINEAR,
        ), metadata=metadata, timeout=10)
        print(f"position: {len(position.series)} point(s), every lead time")
        for series in position.series:
            cells = []
            for sample in series.samples:
                mark = "~" if sample.flags and sample.flags[0] & below_bit else ""
                cells.append(f"{lead_label(sample.lead_time_s)} {sample.values[0]:.0f}{mark}")
            print(f"  {series.point.latitude_deg}, {series.point.longitude_deg}: " + "  ".join(cells))
            if len(series.samples) != len(leads):
                fail(f"position: {len(series.samples)} samples for {len(leads)} lead times")
        print("values in geopotential metres; '~' below ground (extrapolated)")

        # 5. Products: rain-snow guidance at the same points, and the guidance chart.
        pp = importlib.import_module("hypsogrid.v1.products_pb2")
        pr = importlib.import_module("hypsogrid.v1.products_pb2_grpc")
        products = pr.ProductServiceStub(channel)
        field = pp.FieldSelection(cycle_id=cycle.id, time=pb.TimeSelection(lead_time_s=lead),
                                  quantity=quantities[0])
        guidance = products.GetGuidancePoints(
            pp.GuidancePointsRequest(field=field, points=points), metadata=metadata, timeout=30)
        print(f"guidance: lead {lead_label(guidance.field.lead_time_s)}, "
              f"critical 1000-500 hPa {guidance.thresholds.thickness_1000_500_m:.0f} m")
        for p in guidance.points:
            name = pp.PrecipitationType.Name(p.category).removeprefix("PRECIPITATION_TYPE_").lower()
            print(f"  {p.point.latitude_deg}, {p.point.longitude_deg}: {name} ({p.rule}), "
                  f"0 degC level {p.freezing_level_m:.0f} m, wet-bulb 0 degC {p.wet_bulb_zero_m:.0f} m")
        if len(guidance.points) != len(points) or not guidance.caution:
            fail("guidance: every point answered, with the caution")
        chart = products.RenderChart(
            pp.ChartRequest(field=field, kind=pp.CHART_KIND_PRECIPITATION_TYPE, width=400, height=300),
            metadata=metadata, timeout=60)
        if not chart.png.startswith(b"\x89PNG\r\n\x1a\n"):
            fail("chart: the answer is not a PNG")
        print(f"chart: precipitation-type guidance, {len(chart.png)} bytes of PNG")
        print(f"caution: {guidance.caution}")
    return 0


if __name__ == "__main__":
    try:
        sys.exit(main())
    except SystemExit:
        raise
    except Exception as error:  # a gRPC error or anything else: one line, non-zero exit
        code = getattr(error, "code", None)
        details = getattr(error, "details", None)
        if callable(code) and callable(details):
            fail(f"server answered {code().name}: {details()}")
        fail(f"{type(error).__name__}: {error}")
