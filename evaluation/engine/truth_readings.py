"""What each reference's reading of a split leaves out or reads otherwise.

pycocotools' ``np.unique`` loses some image and category ids (``loaders.ids``), a
repeated annotation id gives pycocotools' copies beside the annotations as given
(``loaders.repeated_ids``), an annotation of an unlisted id may carry a lost id's
changed value (``loaders.lost_ids``), and the CityPersons script reads its own keys
(``ignore``, ``vis_ratio``, ``height``). The loaders record these in
``data.GroundTruth``'s columns; ``TruthReadings``, a base of ``data.GroundTruth``,
reads them back per reading: which boxes it leaves out, which (image, class) pairs it
looks up, what the city-scale script compares.
"""

import numpy as np

#: ``GroundTruth.alias`` bits: the image, the category written with a changed value;
#: a copy of a last annotation made by a repeated id on such an annotation (``loadAnns``
#: of an occurrence only pycocotools' ``getAnnIds`` fetches: no other reading has it).
ALIAS_IMAGE, ALIAS_CLASS, ALIAS_COPY = 1, 2, 4
#: ``GroundTruth.repeated`` values: a copy pycocotools' ``loadAnns`` makes of the last
#: annotation of a repeated id (read by its family and the CityPersons script), an
#: annotation such a copy replaces, as the file gives it (read by every other reading).
REPEATED_COPY, REPEATED_GIVEN = 1, 2


class TruthReadings:
    """The readers of ``GroundTruth``'s lost, changed and repeated ids and of its
    city-scale keys (a base of ``data.GroundTruth``: ``self`` holds its columns)."""

    def unique_lost_masks(self):
        """``(per image, per class)`` boolean masks of the images and classes numpy's
        ``np.unique`` loses in pycocotools' and the CityPersons script's ``evaluate``
        (``unique_lost_images``, ``unique_lost_classes``), or None when none is. Every
        rule of those references reads this one answer: their boxes and detections are
        never looked up there, so never scored, compared or refused. Built once per
        truth (the loaders ask per block of detections)."""
        if not (len(self.unique_lost_images) or len(self.unique_lost_classes)):
            return None
        masks = self.__dict__.get("_lost_masks")
        if masks is None:
            images, classes = np.zeros(self.n_images, bool), np.zeros(len(self.classes), bool)
            images[self.unique_lost_images] = True
            classes[self.unique_lost_classes] = True
            masks = images, classes
            object.__setattr__(self, "_lost_masks", masks)
        return masks

    def looked_up(self, image, cls, alias=None):
        """Per (image index, class index) pair (arrays), whether pycocotools-family
        ``evaluate`` looks it up at all (neither id lost: ``unique_lost_masks``).
        ``alias``: per pair, whether it is a detection under a lost category's changed
        value (``Predictions.alias``), which that class's entry finds."""
        lost = self.unique_lost_masks()
        image = np.asarray(image, np.int64)
        if lost is None:
            return np.ones(len(image), bool)
        classes = lost[1][np.asarray(cls, np.int64)]
        if alias is not None:
            classes = classes & ~alias
        return ~(lost[0][image] | classes)

    def left_out_boxes(self, pycocotools):
        """Per box, whether a reading leaves it out (neither scored nor matched), or
        None where it leaves none out. ``pycocotools`` (its family, ``tie_order=
        "image"``): the boxes of images and categories its ``np.unique`` loses
        (``unique_lost_masks``), but not those written with the changed value
        (``alias``), which it scores under the lost entry. Every other reading (the VOC
        devkit, KITTI, the toolbox) keeps every id: it leaves out only those
        ``alias`` boxes, as it leaves out every annotation of an unlisted id. Each
        leaves out the boxes ``repeated_left_out`` names for it."""
        out = self._left_out_ids(pycocotools)
        if self.repeated is None:
            return out
        repeated = self.repeated_left_out(pycocotools)
        return repeated if out is None else out | repeated

    def _left_out_ids(self, pycocotools):
        alias = self.alias
        if not pycocotools:
            return None if alias is None else alias != 0
        lost = self.unique_lost_masks()
        if lost is None:
            return None
        images, classes = lost[0][self.box_image], lost[1][self.box_class]
        if alias is not None:
            images = images & ((alias & ALIAS_IMAGE) == 0)
            classes = classes & ((alias & ALIAS_CLASS) == 0)
        return images | classes

    def repeated_left_out(self, copies):
        """Per box, whether a reading leaves it out for a repeated annotation id
        (``repeated``): one that reads pycocotools' copies (``copies``: its family, the
        CityPersons script) leaves out the annotations as given, every other reading
        the copies. All False where no id is repeated."""
        if self.repeated is None:
            return np.zeros(self.n_boxes, bool)
        return self.repeated == (REPEATED_GIVEN if copies else REPEATED_COPY)

    def n_boxes_read(self, copies=True):
        """How many boxes a reading reads (``repeated_left_out``): pycocotools' rows
        (``copies``, the split's count) or each annotation as given."""
        return self.n_boxes - int(self.repeated_left_out(copies).sum())

    def alias_boxes(self):
        """Per box, whether it is an ``alias`` box (all False where none)."""
        if self.alias is None:
            return np.zeros(self.n_boxes, bool)
        return self.alias != 0

    def unique_counted_images(self):
        """Per image, whether pycocotools-family ``evaluate`` keeps it as an entry of
        ``p.imgIds`` after its ``np.unique`` (``unique_merged_images`` are not), or None
        where every image is one."""
        if not len(self.unique_merged_images):
            return None
        counted = np.ones(self.n_images, bool)
        counted[self.unique_merged_images] = False
        return counted

    def cityscale_ignore(self):
        """Per box, ``(ignore box, matched by plain IoU although ignored)`` as the
        CityPersons script reads the ``ignore`` key: ``ignore_key`` and
        ``ignore_key_fraction``, and where the key is truthy text, an array or an
        object (``cityscale_faults["ignore_read"]``: left unread elsewhere) an ignore
        box whose ``int()`` is 0 or raises."""
        read = self.cityscale_faults.get("ignore_read")
        if not read:
            return self.ignore_key, self.ignore_key_fraction
        flag, fraction = self.ignore_key.copy(), self.ignore_key_fraction.copy()
        boxes = np.array([entry[0] for entry in read], np.int64)
        flag[boxes] = True
        fraction[boxes] = [not entry[2] for entry in read]
        return flag, fraction

    def cityscale_visibility(self):
        """Per box, the visibility ``miss-rate-cityscale`` compares with the setups'
        ranges: ``vis_ratio`` when read (``"as-given"``), else ``visibility`` with
        1.0 where not given."""
        if self.vis_ratio is not None:
            return self.vis_ratio
        return np.where(np.isnan(self.visibility), 1.0, self.visibility)

    def cityscale_height(self):
        """Per box, the height ``miss-rate-cityscale`` compares with the setups' height
        ranges: ``height_key`` where read, else the box's h."""
        return self.boxes[:, 3] if self.height_key is None else self.height_key
