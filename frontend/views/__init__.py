"""Pages, one module per page. Views parse input, call one service or selector, and render."""

from .audit import audit_trail, verify_audit
from .compare import compare, compare_intervals
from .detector import detector, new_detector
from .images import confusion, image_detail, image_file, image_list
from .overview import overview
from .records import records_download
from .rescore import predictions_download, rescore_page
from .specs import release_criteria, suite, webhook
from .splits import load_split, split, split_images_upload, split_list
from .tokens import api_tokens
from .uploads import evaluation_status, upload_predictions
from .version import evidence, sign_off, version

__all__ = [
    "api_tokens",
    "audit_trail",
    "compare",
    "compare_intervals",
    "confusion",
    "detector",
    "evaluation_status",
    "evidence",
    "image_detail",
    "image_file",
    "image_list",
    "load_split",
    "new_detector",
    "overview",
    "predictions_download",
    "records_download",
    "release_criteria",
    "rescore_page",
    "sign_off",
    "split",
    "split_images_upload",
    "split_list",
    "suite",
    "upload_predictions",
    "verify_audit",
    "version",
    "webhook",
]
