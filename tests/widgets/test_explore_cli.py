"""The explore command's pieces, without a browser: notebook, Voila command line, data path."""

from __future__ import annotations

import json

import pytest

from ensemblelab.cli import _explore


def test_explore_voila_command_serves_loopback_only():
    cmd = _explore.voila_command("nb.ipynb", 8123)
    assert "--Voila.ip=127.0.0.1" in cmd and "--port=8123" in cmd and "--no-browser" in cmd
    assert cmd[1:3] == ["-m", "voila"]


def test_explore_free_port_is_bindable():
    import socket

    port = _explore.free_port()
    with socket.socket() as s:
        s.bind(("127.0.0.1", port))


@pytest.mark.slow
def test_explore_generated_notebook_runs_on_a_store(toy, tmp_path):
    import nbformat
    from nbclient import NotebookClient

    import ensemblelab

    store = ensemblelab.save(toy, tmp_path / "toy")
    path = _explore.write_notebook(tmp_path / "nb", store, nonfinite="keep",
                                   explorer={"clusters": False})
    nb = nbformat.read(str(path), as_version=4)
    source = nb.cells[0].source
    # the data path travels as a JSON literal, never as code
    literal = source.split("json.loads(", 1)[1].split(")\n", 1)[0]
    assert json.loads(json.loads(literal))["path"] == str(store.resolve())
    NotebookClient(nb, timeout=300, kernel_name="python3",
                   resources={"metadata": {"path": str(path.parent)}}).execute()
    errors = [o for o in nb.cells[0].outputs if o.get("output_type") == "error"]
    assert not errors, errors
    assert any("application/vnd.jupyter.widget-view+json" in o.get("data", {})
               for o in nb.cells[0].outputs)


def test_explore_missing_path_is_a_clean_error(tmp_path, capsys):
    from ensemblelab.cli import main

    assert main(["explore", str(tmp_path / "nothing")]) == 1
    assert "no such file or folder" in capsys.readouterr().err


# ---------------------------------------------------------------- the server's safety rules
def _serve_trivial(tmp_path, **config):
    """Voila with the explorer's configuration serving a one-cell notebook; (proc, port)."""
    import os
    import subprocess

    import nbformat

    nb = nbformat.v4.new_notebook(cells=[nbformat.v4.new_code_cell("print('ok')")])
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3",
                                 "language": "python"}
    nbformat.write(nb, str(tmp_path / "t.ipynb"))
    _explore.write_server_config(tmp_path, token="t0ken" * 8, **config)
    port = _explore.free_port()
    env = dict(os.environ)
    for key, sub in (("JUPYTER_RUNTIME_DIR", "rt"), ("JUPYTER_CONFIG_DIR", "cfg"),
                     ("JUPYTER_DATA_DIR", "data")):
        env[key] = str(tmp_path / sub)
    from pathlib import Path

    env["PYTHONPATH"] = str(Path(__file__).resolve().parents[2])
    proc = subprocess.Popen(_explore.voila_command(tmp_path / "t.ipynb", port),
                            cwd=str(tmp_path), env=env, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    if not _explore.wait_for_port(port, timeout=120, proc=proc):
        _explore.stop_process_group(proc)
        pytest.fail("voila did not start")
    return proc, port


def _get(port, path, headers=None):
    import http.client

    conn = http.client.HTTPConnection("127.0.0.1", port, timeout=120)
    conn.request("GET", path, headers=headers or {})
    resp = conn.getresponse()
    body = resp.read()
    conn.close()
    return resp.status, resp.getheader("Location") or "", body


@pytest.mark.slow
def test_explore_server_needs_the_token_and_a_loopback_host(tmp_path):
    proc, port = _serve_trivial(tmp_path)
    token = "t0ken" * 8
    try:
        # expected statuses: Jupyter servers redirect a page request without a valid token to
        # /login and answer 403 to a foreign Host (common practice)
        status, where, body = _get(port, "/")
        assert status == 302 and where.startswith("/login") and b"ok" not in body
        status, where, _ = _get(port, "/?token=wrong")
        assert status == 302 and where.startswith("/login")
        status, _, _ = _get(port, f"/?token={token}", {"Host": f"attacker.example:{port}"})
        assert status == 403  # DNS rebinding: a foreign Host is refused
        import http.client
        import re

        conn = http.client.HTTPConnection("127.0.0.1", port, timeout=120)
        conn.request("GET", f"/?token={token}")
        resp = conn.getresponse()
        body = resp.read()
        conn.close()
        assert resp.status == 200 and b"ok" in body
        cookie = "; ".join(c.split(";")[0] for c in resp.headers.get_all("Set-Cookie") or [])
        kernel = re.search(rb"[0-9a-f]{8}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{4}-[0-9a-f]{12}",
                           body).group(0).decode()
        ws = {"Connection": "Upgrade", "Upgrade": "websocket", "Sec-WebSocket-Version": "13",
              "Sec-WebSocket-Key": "dGhlIHNhbXBsZSBub25jZQ==", "Cookie": cookie}
        channels = f"/api/kernels/{kernel}/channels"
        # a page of another site riding on the login cookie: its Origin is refused (403); the
        # explorer's own page is switched to a websocket (101) (common practice)
        assert _get(port, channels, {**ws, "Origin": "http://attacker.example"})[0] == 403
        assert _get(port, channels, {**ws, "Origin": f"http://127.0.0.1:{port}"})[0] == 101
    finally:
        _explore.stop_process_group(proc)


@pytest.mark.slow
def test_explore_server_caps_and_culls_kernels(tmp_path):
    import time

    proc, port = _serve_trivial(tmp_path, max_kernels=1, idle_timeout=2)
    token = "t0ken" * 8
    try:
        assert _get(port, f"/?token={token}")[0] == 200
        assert _get(port, f"/?token={token}")[0] == 503  # one page at a time (the cap)
        end = time.monotonic() + 60
        while time.monotonic() < end:  # the idle kernel is culled, freeing the place
            time.sleep(1.0)
            if _get(port, f"/?token={token}")[0] == 200:
                break
        else:
            pytest.fail("the idle kernel was never culled")
    finally:
        _explore.stop_process_group(proc)


def test_explore_token_travels_in_a_private_file_not_the_command_line(tmp_path):
    import os
    import stat

    path = _explore.write_server_config(tmp_path, token="s3cret", allow_hosts=["box.lan"])
    assert stat.S_IMODE(os.stat(path).st_mode) == 0o600
    config = json.loads(path.read_text())
    assert config["Voila"]["token"] == "s3cret"
    assert config["Voila"]["tornado_settings"]["local_hostnames"] == ["localhost", "box.lan"]
    assert config["Voila"]["tornado_settings"]["allow_remote_access"] is False
    assert not any("s3cret" in part for part in _explore.voila_command(tmp_path / "n", 1))


def test_explore_default_exports_sit_beside_the_data(tmp_path):
    data = tmp_path / "run1"
    data.mkdir()
    assert _explore.default_exports(data, demo=False) == (tmp_path / "run1.exports").resolve()


def test_export_panel_never_writes_outside_its_folder(tmp_path):
    from ensemblelab.testing import make_toy_ensemble
    from ensemblelab.widgets.export import ExportPanel, confined_export_folder

    root = tmp_path / "exports"
    root.mkdir()
    (root / "link").symlink_to(tmp_path)
    assert confined_export_folder(root, "sub") == (root / "sub").resolve()
    for bad in ("..", "../elsewhere", str(tmp_path / "elsewhere"), "link/x", "/etc"):
        with pytest.raises(ValueError, match="outside the export folder"):
            confined_export_folder(root, bad)
    panel = ExportPanel(make_toy_ensemble(3), folder=root)
    panel.model.selected = tuple(panel.model.ens.snapshots["snapshot"][:2])
    panel.folder.value = str(tmp_path / "elsewhere")
    panel.click("structures XYZ")
    assert any("outside the export folder" in m["text"] for m in panel.messages.errors)
    assert not (tmp_path / "elsewhere").exists()
    panel.folder.value = "ok"
    panel.click("structures XYZ")
    assert (root / "ok" / "selection.xyz").is_file()


@pytest.mark.slow
def test_explore_notebook_opens_on_the_chosen_observable(toy, tmp_path):
    import nbformat
    from nbclient import NotebookClient

    import ensemblelab

    store = ensemblelab.save(toy, tmp_path / "toy")
    default = _explore.write_notebook(tmp_path / "nb0", store, nonfinite="keep")
    literal = nbformat.read(str(default), as_version=4).cells[0].source.split(
        "json.loads(", 1)[1].split(")\n", 1)[0]
    config = json.loads(json.loads(literal))
    # other data than the demo never get the invented strengths unless asked
    assert config["observable"] == "photoelectron" and config["demo_strengths"] is False
    path = _explore.write_notebook(tmp_path / "nb", store, nonfinite="keep",
                                   explorer={"clusters": False}, observable="absorption",
                                   demo_strengths=True)
    nb = nbformat.read(str(path), as_version=4)
    NotebookClient(nb, timeout=300, kernel_name="python3", store_widget_state=True,
                   resources={"metadata": {"path": str(path.parent)}}).execute()
    assert not [o for o in nb.cells[0].outputs if o.get("output_type") == "error"]
    state = nb.metadata["widgets"]["application/vnd.jupyter.widget-state+json"]["state"]
    toggles = [m["state"] for m in state.values()
               if m["model_name"] == "ToggleButtonsModel"
               and "scattering" in m["state"].get("_options_labels", [])]
    assert len(toggles) == 1 and toggles[0]["index"] == 1  # "absorption"
    # the toy has no strengths of its own: the invented ones made the map (no error text)
    html_values = [m["state"].get("value", "") for m in state.values()
                   if "ensemblelab-observable-status" in m["state"].get("_dom_classes", [])]
    assert html_values and "transition_strengths" not in html_values[0]
