from django import forms

from evaluation.models import BenchmarkSplit


class SplitForm(forms.Form):
    name = forms.SlugField(max_length=64, help_text="e.g. bay-night")
    revision = forms.IntegerField(min_value=1)
    truth = forms.FileField(
        label="Ground truth",
        help_text="COCO-style JSON, a boxes CSV, or a zip of KITTI, YOLO or VOC XML labels",
    )
    images = forms.FileField(
        required=False, help_text="Images table CSV (for a CSV split; optional for a zip)"
    )
    description = forms.CharField(required=False, widget=forms.Textarea(attrs={"rows": 2}))
    annotations = forms.ChoiceField(
        label="Annotations (COCO-style JSON)",
        choices=[
            ("reference", "as pycocotools reads them (left-out annotations counted and shown)"),
            ("strict", "strict: refuse repeated ids and annotations of unlisted images/categories"),
        ],
        initial="reference",
        required=False,
    )


class PredictionsForm(forms.Form):
    version = forms.CharField(max_length=64, help_text="An existing label, or a new one")
    split = forms.ModelChoiceField(queryset=BenchmarkSplit.objects.all())
    predictions = forms.FileField(
        help_text="COCO-style results JSON, CSV, a zip of KITTI, YOLO or VOC label files "
        "or VOC result files, or one class's VOC result file (comp4_det_test_car.txt)"
    )
    source_commit = forms.CharField(max_length=64, required=False)
    notes = forms.CharField(required=False, widget=forms.Textarea(attrs={"rows": 2}))
