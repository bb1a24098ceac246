"""IIIF Image API size negotiation (sources.iiif_sizes), checked against the Image API texts.

Check values: IIIF Image API 3.0 §4.2 (size syntax "max", "w,", "w,h", "!w,h", "^" to go above
the full size) and §5 (image information: width/height, sizes, tiles, maxWidth/maxHeight/maxArea,
"maxHeight defaults to maxWidth when only maxWidth is given", profile level0/1/2); IIIF Image
API 2.1 §4.2 (size syntax "full", "w,", "!w,h") and §5 (@id, profile as a list whose first entry
is the compliance level URI and whose later objects may hold maxWidth/maxHeight/maxArea); the
compliance documents (level 1: sizeByW; level 2: sizeByConfinedWh; level 0: full/max and the
listed sizes only).
"""

from __future__ import annotations

from collector.sources.iiif_sizes import ServiceInfo, choose_size, parse_info, service_version

SVC3 = "https://img.example.org/iiif/3/leaf"
SVC2 = "https://img.example.org/iiif/2/leaf"


def info3(**over: object) -> dict:
    """An Image API 3.0 info.json (§5.1 example shape)."""
    doc = {"@context": "http://iiif.io/api/image/3/context.json", "id": SVC3,
           "type": "ImageService3", "protocol": "http://iiif.io/api/image",
           "profile": "level2", "width": 6000, "height": 8000}
    doc.update(over)
    return doc


def info2(*profile_extra: dict, **over: object) -> dict:
    """An Image API 2.1 info.json (§5.1 example shape)."""
    doc = {"@context": "http://iiif.io/api/image/2/context.json", "@id": SVC2,
           "protocol": "http://iiif.io/api/image", "width": 6000, "height": 8000,
           "profile": ["http://iiif.io/api/image/2/level2.json", *profile_extra]}
    doc.update(over)
    return doc


def parsed(doc: dict, version: str = "3.0") -> ServiceInfo:
    """parse_info that must succeed."""
    got = parse_info(doc, SVC3 if version == "3.0" else SVC2, version)
    assert isinstance(got, ServiceInfo), got
    return got


def test_service_versions_from_type_context_and_profile():
    """3.0 services say type ImageService3 (3.0 §5); 2.1 ones a level URI under image/2 (2.1 §5)."""
    assert service_version({"id": SVC3, "type": "ImageService3", "profile": "level1"}) == "3.0"
    assert service_version({"@id": SVC2, "@type": "ImageService2"}) == "2.1"
    assert service_version({"@id": SVC2, "@context": "http://iiif.io/api/image/2/context.json",
                            "profile": "http://iiif.io/api/image/2/level1.json"}) == "2.1"
    assert service_version({"id": "https://x.example.org/auth", "type": "AuthService"}) is None
    # Image API 1.1 (context image/1) has another size syntax: not negotiated, used as given.
    assert service_version({"@id": SVC2, "@context": "http://iiif.io/api/image/1/context.json",
                            "profile": "http://library.stanford.edu/iiif/image-api/1.1/"
                                       "compliance.html#level1"}) is None


def test_level_2_asks_for_a_confined_box_at_the_target():
    """Level 2, 6000x8000, target 1024: "!768,1024" (3.0 §4.2 !w,h keeps the aspect ratio)."""
    choice = choose_size(parsed(info3()), 1024)
    assert choice.size == "!768,1024"
    assert choice.url == f"{SVC3}/full/!768,1024/0/default.jpg"  # 3.0 §4 URI template
    assert (choice.width, choice.height) == (768, 1024)
    assert "target_size 1024" in choice.why


def test_max_width_limits_the_request_and_max_height_defaults_to_it():
    """maxWidth 500 caps the width, and maxHeight defaults to maxWidth (3.0 §5): 375x500."""
    choice = choose_size(parsed(info3(maxWidth=500)), 1024)
    assert (choice.width, choice.height) == (375, 500)
    assert "maxHeight 500" in choice.why  # the defaulted maxHeight decides a portrait image
    wide = choose_size(parsed(info3(maxWidth=500, width=8000, height=6000)), 1024)
    assert (wide.width, wide.height) == (500, 375) and "maxWidth 500" in wide.why


def test_max_area_limits_the_request():
    """maxArea 120000 (3.0 §5): w*h never above it."""
    choice = choose_size(parsed(info3(maxArea=120_000)), 1024)
    assert choice.width * choice.height <= 120_000
    assert choice.width == 300 and choice.height == 400


def test_level_1_asks_by_width():
    """Level 1 supports "w," only (compliance sizeByW), not "!w,h"."""
    choice = choose_size(parsed(info3(profile="level1")), 1024)
    assert choice.size == "768,"


def test_never_upscale_a_small_image():
    """An image smaller than the target is asked for at "max" (3.0 §4.2), never above it."""
    choice = choose_size(parsed(info3(width=600, height=800)), 1024)
    assert choice.size == "max" and (choice.width, choice.height) == (600, 800)
    # ^ only when the recipe asks and the service lists sizeUpscaling (3.0 §4.2, §5.7).
    assert choose_size(parsed(info3(width=600, height=800)), 1024, upscale=True).size == "max"
    up = choose_size(parsed(info3(width=600, height=800, extraFeatures=["sizeUpscaling"])),
                     1024, upscale=True)
    assert up.size == "^!1024,1024"


def test_level_0_picks_the_smallest_listed_size_at_or_above_the_target():
    """Level 0 can serve only listed sizes (3.0 §5 "sizes"), asked for as w,h in 3.0."""
    sizes = [{"width": w, "height": h} for w, h in
             ((375, 500), (750, 1000), (1500, 2000), (3000, 4000))]
    choice = choose_size(parsed(info3(profile="level0", sizes=sizes)), 1024)
    assert choice.size == "1500,2000"
    assert choice.url == f"{SVC3}/full/1500,2000/0/default.jpg"
    exact = choose_size(parsed(info3(profile="level0", sizes=[*sizes, {"width": 768,
                                                                        "height": 1024}])), 1024)
    assert exact.size == "768,1024"
    below = choose_size(parsed(info3(profile="level0", sizes=sizes[:2])), 1024)
    assert below.size == "750,1000" and "largest listed" in below.why
    # listed = "at_most": never more pixels than the target, when a size allows it
    at_most = choose_size(parsed(info3(profile="level0", sizes=sizes)), 1024, listed="at_most")
    assert at_most.size == "750,1000" and "at or below" in at_most.why
    only_big = choose_size(parsed(info3(profile="level0", sizes=sizes[2:])), 1024,
                           listed="at_most")
    assert only_big.size == "1500,2000"


def test_level_0_with_only_tiles_says_why_nothing_is_asked_for():
    """Level 0, no sizes, a full size above the target: no request, a reason naming tiles."""
    tiles = [{"width": 512, "scaleFactors": [1, 2, 4, 8, 16]}]
    got = choose_size(parsed(info3(profile="level0", tiles=tiles)), 1024)
    assert isinstance(got, str) and "only tiles" in got
    small = choose_size(parsed(info3(profile="level0", width=800, height=600)), 1024)
    assert small.size == "max"


def test_image_api_2_1_profile_objects_and_size_words():
    """2.1: limits sit in the profile list (§5); sizes are "!w,h", "w," and "full" (§4.2)."""
    got = parsed(info2({"maxWidth": 2000, "supports": ["sizeByWhListed"]}), "2.1")
    assert got.level == 2 and got.max_width == 2000 and got.max_height == 2000
    assert choose_size(got, 1024).size == "!768,1024"
    small = parsed(info2(width=600, height=800), "2.1")
    assert choose_size(small, 1024).size == "full"
    level0 = parsed(info2(profile=["http://iiif.io/api/image/2/level0.json"],
                          sizes=[{"width": 768, "height": 1024}]), "2.1")
    assert choose_size(level0, 1024).size == "768,"  # 2.1 canonical form w, (§4.7)


def test_info_without_dimensions_is_refused_with_a_reason():
    """width and height are required (3.0 §5, 2.1 §5): otherwise a sentence, not a guess."""
    assert "width and height" in parse_info({"id": SVC3}, SVC3, "3.0")
    assert "not a JSON object" in parse_info([1, 2], SVC3, "3.0")
    assert "width and height" in parse_info(info3(width=-5), SVC3, "3.0")
    assert "width and height" in parse_info(info3(height=True), SVC3, "3.0")


def test_a_billion_by_billion_claim_still_asks_only_for_the_target():
    """An info.json claiming 10^9 x 10^9 pixels gives a target-sized request at level 2, and
    no request at level 0 without sizes (hostile input; common practice, no source)."""
    huge = parsed(info3(width=10**9, height=10**9))
    choice = choose_size(huge, 1024)
    assert max(choice.width, choice.height) <= 1024
    assert isinstance(choose_size(parsed(info3(width=10**9, height=10**9, profile="level0")),
                                  1024), str)
    many = parsed(info3(profile="level0", sizes=[{"width": 10**9, "height": 10**9}] * 10**5))
    assert len(many.sizes) <= 256
