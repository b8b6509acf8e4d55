from django.http import HttpResponse


def overview(request):
    return HttpResponse("")


split_list = load_split = detector = upload_predictions = evaluation_status = overview
