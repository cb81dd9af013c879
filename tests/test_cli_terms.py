from closure.cli import main


def test_terms_lists_the_library_and_what_it_left_out(capsys):
    assert main(["terms", "--target", "stress", "--dims", "2"]) == 0
    out = capsys.readouterr().out
    assert "library default for stress in 2-D (tau_xx, tau_xy, tau_yy)" in out
    # the gradient model of Clark, Ferziger & Reynolds (1979): Delta^2/12 d_k u_i d_k u_j
    assert "xy: Delta**2*du_dx*dv_dx/12 + Delta**2*du_dy*dv_dy/12" in out
    # in 2-D, S S = (|S|^2/4) I when tr S = 0 (Cayley-Hamilton), so it is left out
    assert "left out: strain_squared" in out and "1/4 isotropic" in out


def test_terms_syntax_and_bad_dimension(capsys):
    assert main(["terms", "--syntax"]) == 0
    assert "A YAML or JSON file" in capsys.readouterr().out
    assert main(["terms", "--dims", "4"]) == 2
    assert "--dims must be 1, 2 or 3" in capsys.readouterr().err
