"""pb gathers the generated reckon.v1 message modules under short names:
robot_pb2 (Robot, RobotConfig, FloorPose, Covariance, ...), samples_pb2
(Sample, OdometrySample, Fix, ...) and fusion_service_pb2 (requests,
responses, Verdict, FusedPose, ...), plus fusion_service_pb2_grpc."""

from reckonpy._pb.reckon.v1 import fusion_service_pb2, fusion_service_pb2_grpc, robot_pb2, samples_pb2

__all__ = ["fusion_service_pb2", "fusion_service_pb2_grpc", "robot_pb2", "samples_pb2"]
