"""The sandbox's patch engines checked against the published standards' own examples.

- RFC 7386 (JSON Merge Patch), Appendix A "Example Test Cases" (table recalled from
  memory; each row is the RFC's ORIGINAL / PATCH / RESULT).
- RFC 6902 (JSON Patch), Appendix A examples (A.1–A.16, from memory).
- Strategic merge patch: the Kubernetes task page "Update API Objects in Place Using
  kubectl patch" (a second container is merged in by `name`; `tolerations` has no merge
  key and is replaced) and the apimachinery directives (`$patch: replace|delete`,
  `$setElementOrder`, `$deleteFromPrimitiveList`, from memory of the SMP design doc).
"""

from __future__ import annotations

import pytest

from ratefit.controller.sandbox.patches import (
    PatchError,
    json_patch,
    merge_patch,
    strategic_merge,
)

# RFC 7386 Appendix A (from memory)
RFC7386 = [
    ({"a": "b"}, {"a": "c"}, {"a": "c"}),
    ({"a": "b"}, {"b": "c"}, {"a": "b", "b": "c"}),
    ({"a": "b"}, {"a": None}, {}),
    ({"a": "b", "b": "c"}, {"a": None}, {"b": "c"}),
    ({"a": ["b"]}, {"a": "c"}, {"a": "c"}),
    ({"a": "c"}, {"a": ["b"]}, {"a": ["b"]}),
    ({"a": {"b": "c"}}, {"a": {"b": "d", "c": None}}, {"a": {"b": "d"}}),
    ({"a": [{"b": "c"}]}, {"a": [1]}, {"a": [1]}),
    (["a", "b"], ["c", "d"], ["c", "d"]),
    ({"a": "b"}, ["c"], ["c"]),
    ({"a": "foo"}, None, None),
    ({"a": "foo"}, "bar", "bar"),
    ({"e": None}, {"a": 1}, {"e": None, "a": 1}),
    ([1, 2], {"a": "b", "c": None}, {"a": "b"}),
    ({}, {"a": {"bb": {"ccc": None}}}, {"a": {"bb": {}}}),
]


@pytest.mark.parametrize(("original", "patch", "result"), RFC7386)
def test_rfc7386_appendix_a(original, patch, result) -> None:
    assert merge_patch(original, patch) == result


# RFC 6902 Appendix A (from memory): (document, patch, expected result or None for error)
RFC6902 = [
    # A.1 adding an object member
    ({"foo": "bar"}, [{"op": "add", "path": "/baz", "value": "qux"}],
     {"baz": "qux", "foo": "bar"}),
    # A.2 adding an array element
    ({"foo": ["bar", "baz"]}, [{"op": "add", "path": "/foo/1", "value": "qux"}],
     {"foo": ["bar", "qux", "baz"]}),
    # A.3 removing an object member
    ({"baz": "qux", "foo": "bar"}, [{"op": "remove", "path": "/baz"}], {"foo": "bar"}),
    # A.4 removing an array element
    ({"foo": ["bar", "qux", "baz"]}, [{"op": "remove", "path": "/foo/1"}],
     {"foo": ["bar", "baz"]}),
    # A.5 replacing a value
    ({"baz": "qux", "foo": "bar"}, [{"op": "replace", "path": "/baz", "value": "boo"}],
     {"baz": "boo", "foo": "bar"}),
    # A.6 moving a value
    ({"foo": {"bar": "baz", "waldo": "fred"}, "qux": {"corge": "grault"}},
     [{"op": "move", "from": "/foo/waldo", "path": "/qux/thud"}],
     {"foo": {"bar": "baz"}, "qux": {"corge": "grault", "thud": "fred"}}),
    # A.7 moving an array element
    ({"foo": ["all", "grass", "cows", "eat"]}, [{"op": "move", "from": "/foo/1",
                                                 "path": "/foo/3"}],
     {"foo": ["all", "cows", "eat", "grass"]}),
    # A.8 testing a value: success
    ({"baz": "qux", "foo": ["a", 2, "c"]}, [{"op": "test", "path": "/baz", "value": "qux"},
                                            {"op": "test", "path": "/foo/1", "value": 2}],
     {"baz": "qux", "foo": ["a", 2, "c"]}),
    # A.9 testing a value: error
    ({"baz": "qux"}, [{"op": "test", "path": "/baz", "value": "bar"}], None),
    # A.10 adding a nested member object
    ({"foo": "bar"}, [{"op": "add", "path": "/child", "value": {"grandchild": {}}}],
     {"foo": "bar", "child": {"grandchild": {}}}),
    # A.11 ignoring unrecognized elements
    ({"foo": "bar"}, [{"op": "add", "path": "/baz", "value": "qux", "xyz": 123}],
     {"foo": "bar", "baz": "qux"}),
    # A.12 adding to a nonexistent target
    ({"foo": "bar"}, [{"op": "add", "path": "/baz/bat", "value": "qux"}], None),
    # A.14 ~ escape ordering
    ({"/": 9, "~1": 10}, [{"op": "test", "path": "/~01", "value": 10}], {"/": 9, "~1": 10}),
    # A.15 comparing strings and numbers
    ({"/": 9, "~1": 10}, [{"op": "test", "path": "/~01", "value": "10"}], None),
    # A.16 adding an array value
    ({"foo": ["bar"]}, [{"op": "add", "path": "/foo/-", "value": ["abc", "def"]}],
     {"foo": ["bar", ["abc", "def"]]}),
]


@pytest.mark.parametrize(("doc", "patch", "result"), RFC6902)
def test_rfc6902_appendix_a(doc, patch, result) -> None:
    if result is None:
        with pytest.raises(PatchError):
            json_patch(doc, patch)
    else:
        assert json_patch(doc, patch) == result
        assert doc != result or patch[0]["op"] == "test"   # the input is not mutated


def test_json_patch_is_atomic() -> None:
    doc = {"a": 1}
    with pytest.raises(PatchError):
        json_patch(doc, [{"op": "replace", "path": "/a", "value": 2},
                         {"op": "remove", "path": "/missing"}])
    assert doc == {"a": 1}


DEMO = {  # the case the kubectl patch task page walks through, with names of our own
    "spec": {"template": {"spec": {
        "containers": [{"name": "printer", "image": "registry.example/label-printer:3"}],
        "tolerations": [{"effect": "NoSchedule", "key": "team", "value": "parcels"}],
    }}}}


def test_strategic_merge_adds_a_container_by_name() -> None:
    # kubectl patch task page: a strategic patch adding a second container keeps both
    out = strategic_merge(DEMO, {"spec": {"template": {"spec": {"containers": [
        {"name": "log-shipper", "image": "registry.example/log-shipper:1"}]}}}})
    assert out["spec"]["template"]["spec"]["containers"] == [
        {"name": "printer", "image": "registry.example/label-printer:3"},
        {"name": "log-shipper", "image": "registry.example/log-shipper:1"}]


def test_strategic_merge_replaces_lists_without_merge_key() -> None:
    # same page: `tolerations` has no patch strategy, so the list is replaced
    out = strategic_merge(DEMO, {"spec": {"template": {"spec": {"tolerations": [
        {"effect": "NoSchedule", "key": "zone", "value": "north"}]}}}})
    assert out["spec"]["template"]["spec"]["tolerations"] == [
        {"effect": "NoSchedule", "key": "zone", "value": "north"}]


def test_json_merge_patch_replaces_containers_on_the_same_page() -> None:
    # same page, "Use a JSON merge patch": the containers list is replaced whole
    out = merge_patch(DEMO, {"spec": {"template": {"spec": {"containers": [
        {"name": "printer-3", "image": "registry.example/label-printer:4"}]}}}})
    assert out["spec"]["template"]["spec"]["containers"] == [
        {"name": "printer-3", "image": "registry.example/label-printer:4"}]


def test_strategic_merge_directives() -> None:
    base = {"containers": [{"name": "a", "image": "1", "env": [{"name": "X", "value": "1"}]},
                           {"name": "b", "image": "2"}],
            "finalizers": ["f1", "f2"], "labels": {"k": "v", "j": "w"}}
    # $patch: replace on a list item replaces the whole list
    out = strategic_merge(base, {"containers": [{"name": "c", "image": "3"},
                                                {"$patch": "replace"}]})
    assert out["containers"] == [{"name": "c", "image": "3"}]
    # $patch: delete removes by merge key; null deletes a map key
    out = strategic_merge(base, {"containers": [{"name": "a", "$patch": "delete"}],
                                 "labels": {"j": None}})
    assert [c["name"] for c in out["containers"]] == ["b"] and out["labels"] == {"k": "v"}
    # finalizers merge as a set; $deleteFromPrimitiveList removes members
    out = strategic_merge(base, {"finalizers": ["f3"]})
    assert out["finalizers"] == ["f1", "f2", "f3"]
    out = strategic_merge(base, {"$deleteFromPrimitiveList/finalizers": ["f1"]})
    assert out["finalizers"] == ["f2"]
    # $setElementOrder orders merged lists (kubectl apply sends it)
    out = strategic_merge(base, {"$setElementOrder/containers": [{"name": "b"}, {"name": "a"}],
                                 "containers": [{"name": "a", "image": "9"}]})
    assert [(c["name"], c["image"]) for c in out["containers"]] == [("b", "2"), ("a", "9")]
    # a map-level $patch: replace replaces the map
    out = strategic_merge(base, {"labels": {"$patch": "replace", "only": "this"}})
    assert out["labels"] == {"only": "this"}
    assert base["labels"] == {"k": "v", "j": "w"}   # input not mutated


def test_container_ports_merge_by_container_port() -> None:
    # core/v1 Container.ports: patchMergeKey containerPort (k8s.io/api core/v1 types.go)
    base = {"containers": [{"name": "a", "ports": [{"containerPort": 80, "name": "http"}]}]}
    out = strategic_merge(base, {"containers": [{"name": "a", "ports": [
        {"containerPort": 9090, "name": "metrics"}]}]})
    assert [p["containerPort"] for p in out["containers"][0]["ports"]] == [80, 9090]
