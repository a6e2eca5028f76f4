"""Runge-Kutta coefficient tables (data only; the stepping loop is ``stepper.py``).

A method is a :class:`Tableau`: its Butcher coefficients, error-estimator weights and
dense-output weights, laid out the same way for every method so that the one compiled
loop serves all of them:

* stages ``0 .. s-1`` are the method's stages (stage 0 = f(t_n, y_n));
* stage ``s`` is f(t_n + h, y_{n+1}) (row ``s`` of ``A`` = ``b``, ``c[s]`` = 1).  It is
  evaluated once per accepted step and reused as stage 0 of the next step, so a step
  costs ``s`` evaluations whether or not the pair is FSAL;
* stages ``s+1 ..`` are extra stages evaluated only when a step needs dense output;
* the local error estimate is ``h * sum_i e[i] k_i`` over stages ``0 .. s``;
* dense output: ``y(t_n + theta h) = y_n + h * sum_i k_i * sum_m P[i, m] theta**(m+1)``
  over all stages.

Evaluations per accepted step: DOP853 12 (+3 when the step needs dense output),
RK8(7)13M 13 (+1), RK5(4) 6 (+0); a rejected step costs the same as an accepted one.

Methods (config name: method):

``dop853``
    DOP853: explicit RK of order 8 with a 5th- and a 3rd-order error estimate combined
    as in Hairer's code, and a 7th-order continuous extension using 3 extra stages.
    E. Hairer, S. P. Norsett, G. Wanner, *Solving Ordinary Differential Equations I*,
    2nd ed., Springer 1993, Sec. II.10 (coefficients of the code DOP853).  The numbers
    below are those of scipy ``scipy/integrate/_ivp/dop853_coefficients.py`` (a
    transcription of Hairer's Fortran code); tests compare them with that module.
``rk87``
    RK8(7)13M: P. J. Prince, J. R. Dormand, "High order embedded Runge-Kutta formulae",
    J. Comput. Appl. Math. 7(1), 67-75, 1981 (13 stages, 8th-order solution, 7th-order
    embedded).  Rational coefficients as published (cross-read from two public
    transcriptions; all rooted-tree order conditions up to order 8 resp. 7 are checked
    in ``tests/test_integrators.py``).  Continuous extension: no published one is used;
    ours is a 6th-order continuous Runge-Kutta extension (Hairer-Norsett-Wanner I,
    Sec. II.6, order conditions ``sum_i b_i(theta) Phi_i(t) = theta^|t| / gamma(t)``)
    using the 13 stages, f(t_n+h, y_{n+1}) and one extra stage at theta = 0.65 whose
    internal value is a 5th-order extension of the same kind ("bootstrapping": W. H.
    Enright, K. R. Jackson, S. P. Norsett, P. G. Thomsen, "Interpolants for Runge-Kutta
    formulas", ACM TOMS 12(3), 193-218, 1986).  Both weight sets are the minimum-norm
    solutions of the linear conditions for all trees up to order 5 resp. 6 plus
    y(1) = y_{n+1}, y'(0) = f_n, y'(1) = f_{n+1} (C1 across steps), computed by
    ``tests/test_integrators.py::derive_rk87_dense`` which also re-checks them.
``rk54``
    RK5(4)7M "DOPRI5": J. R. Dormand, P. J. Prince, "A family of embedded Runge-Kutta
    formulae", J. Comput. Appl. Math. 6(1), 19-26, 1980; 4th-order dense output of
    L. F. Shampine, "Some practical Runge-Kutta formulas", Math. Comp. 46(173),
    135-150, 1986 (coefficients as in scipy ``RK45.P``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

ERROR_STANDARD = 0
"""Error estimate ``h * sum e_i k_i``."""
ERROR_DOP853 = 1
"""DOP853 estimate: 5th-order estimate ``e`` scaled by the 3rd-order ``e_aux`` (HNW I, II.10)."""


@dataclass(frozen=True)
class Tableau:
    """Coefficients of one embedded explicit Runge-Kutta pair with dense output.

    Attributes:
        name: config name.
        title: published name and reference, one line.
        order: order of the propagated solution.
        error_order: order of the error estimate (step-size exponent 1/(error_order+1)); for
            DOP853 the combined estimate |e5|^2/sqrt(|e5|^2 + 0.01|e3|^2) ~ h^8, so 7,
            although its embedded solutions are of orders 5 and 3.
        n_stages: ``s``, stages per step (stage ``s`` = f at the new point, see module doc).
        A: (n_total, n_total) stage coefficients, rows ``s`` and beyond included.
        c: (n_total,) stage nodes.
        b: (s,) weights of the solution.
        e: (s+1,) error weights over stages 0..s.
        e_aux: (s+1,) second error weights (DOP853 only, else zeros).
        error_kind: ERROR_STANDARD or ERROR_DOP853.
        P: (n_total, dense_degree) dense-output weight polynomials.
        dense_order: order of the continuous extension.
        fsal: the last stage of the pair is f(t_n+h, y_{n+1}) (informational).
    """

    name: str
    title: str
    order: int
    error_order: int
    n_stages: int
    A: np.ndarray
    c: np.ndarray
    b: np.ndarray
    e: np.ndarray
    e_aux: np.ndarray
    error_kind: int
    P: np.ndarray
    dense_order: int
    fsal: bool

    @property
    def n_total(self) -> int:
        """Number of stages including f at the new point and the dense-output stages."""
        return self.A.shape[0]

    @property
    def dense_extra_stages(self) -> int:
        """Evaluations a step needs in addition when dense output is requested."""
        return self.n_total - self.n_stages - 1


# ---------------------------------------------------------------------------------------
# DOP853 (Hairer, Norsett & Wanner 1993; numbers as in scipy dop853_coefficients.py)
# ---------------------------------------------------------------------------------------
_DOP853_C = np.array([
    0.0, 0.526001519587677318785587544488e-01, 0.789002279381515978178381316732e-01,
    0.118350341907227396726757197510, 0.281649658092772603273242802490, 0.333333333333333333333333333333,
    0.25, 0.307692307692307692307692307692, 0.651282051282051282051282051282,
    0.6, 0.857142857142857142857142857142, 1.0,
    1.0, 0.1, 0.2,
    0.777777777777777777777777777778,
])
_DOP853_A = np.zeros((16, 16))
_DOP853_A[1, [0]] = [
    5.26001519587677318785587544488e-2,
]
_DOP853_A[2, [0, 1]] = [
    1.97250569845378994544595329183e-2,
    5.91751709536136983633785987549e-2,
]
_DOP853_A[3, [0, 2]] = [
    2.95875854768068491816892993775e-2,
    8.87627564304205475450678981324e-2,
]
_DOP853_A[4, [0, 2, 3]] = [
    2.41365134159266685502369798665e-1,
    -8.84549479328286085344864962717e-1,
    9.24834003261792003115737966543e-1,
]
_DOP853_A[5, [0, 3, 4]] = [
    3.7037037037037037037037037037e-2,
    1.70828608729473871279604482173e-1,
    1.25467687566822425016691814123e-1,
]
_DOP853_A[6, [0, 3, 4, 5]] = [
    3.7109375e-2,
    1.70252211019544039314978060272e-1,
    6.02165389804559606850219397283e-2,
    -1.7578125e-2,
]
_DOP853_A[7, [0, 3, 4, 5, 6]] = [
    3.70920001185047927108779319836e-2,
    1.70383925712239993810214054705e-1,
    1.07262030446373284651809199168e-1,
    -1.53194377486244017527936158236e-2,
    8.27378916381402288758473766002e-3,
]
_DOP853_A[8, [0, 3, 4, 5, 6, 7]] = [
    6.24110958716075717114429577812e-1,
    -3.36089262944694129406857109825,
    -8.68219346841726006818189891453e-1,
    2.75920996994467083049415600797e1,
    2.01540675504778934086186788979e1,
    -4.34898841810699588477366255144e1,
]
_DOP853_A[9, [0, 3, 4, 5, 6, 7, 8]] = [
    4.77662536438264365890433908527e-1,
    -2.48811461997166764192642586468,
    -5.90290826836842996371446475743e-1,
    2.12300514481811942347288949897e1,
    1.52792336328824235832596922938e1,
    -3.32882109689848629194453265587e1,
    -2.03312017085086261358222928593e-2,
]
_DOP853_A[10, [0, 3, 4, 5, 6, 7, 8, 9]] = [
    -9.3714243008598732571704021658e-1,
    5.18637242884406370830023853209,
    1.09143734899672957818500254654,
    -8.14978701074692612513997267357,
    -1.85200656599969598641566180701e1,
    2.27394870993505042818970056734e1,
    2.49360555267965238987089396762,
    -3.0467644718982195003823669022,
]
_DOP853_A[11, [0, 3, 4, 5, 6, 7, 8, 9, 10]] = [
    2.27331014751653820792359768449,
    -1.05344954667372501984066689879e1,
    -2.00087205822486249909675718444,
    -1.79589318631187989172765950534e1,
    2.79488845294199600508499808837e1,
    -2.85899827713502369474065508674,
    -8.87285693353062954433549289258,
    1.23605671757943030647266201528e1,
    6.43392746015763530355970484046e-1,
]
_DOP853_A[12, [0, 5, 6, 7, 8, 9, 10, 11]] = [
    5.42937341165687622380535766363e-2,
    4.45031289275240888144113950566,
    1.89151789931450038304281599044,
    -5.8012039600105847814672114227,
    3.1116436695781989440891606237e-1,
    -1.52160949662516078556178806805e-1,
    2.01365400804030348374776537501e-1,
    4.47106157277725905176885569043e-2,
]
_DOP853_A[13, [0, 6, 7, 8, 9, 10, 11, 12]] = [
    5.61675022830479523392909219681e-2,
    2.53500210216624811088794765333e-1,
    -2.46239037470802489917441475441e-1,
    -1.24191423263816360469010140626e-1,
    1.5329179827876569731206322685e-1,
    8.20105229563468988491666602057e-3,
    7.56789766054569976138603589584e-3,
    -8.298e-3,
]
_DOP853_A[14, [0, 5, 6, 7, 10, 11, 12, 13]] = [
    3.18346481635021405060768473261e-2,
    2.83009096723667755288322961402e-2,
    5.35419883074385676223797384372e-2,
    -5.49237485713909884646569340306e-2,
    -1.08347328697249322858509316994e-4,
    3.82571090835658412954920192323e-4,
    -3.40465008687404560802977114492e-4,
    1.41312443674632500278074618366e-1,
]
_DOP853_A[15, [0, 5, 6, 7, 8, 12, 13, 14]] = [
    -4.28896301583791923408573538692e-1,
    -4.69762141536116384314449447206,
    7.68342119606259904184240953878,
    4.06898981839711007970213554331,
    3.56727187455281109270669543021e-1,
    -1.39902416515901462129418009734e-3,
    2.9475147891527723389556272149,
    -9.15095847217987001081870187138,
]
_DOP853_E3_BHAT = {0: 0.244094488188976377952755905512, 8: 0.733846688281611857341361741547, 11: 0.220588235294117647058823529412e-1}
_DOP853_E5 = np.zeros(13)
_DOP853_E5[[0, 5, 6, 7, 8, 9, 10, 11]] = [
    0.1312004499419488073250102996e-1,
    -0.1225156446376204440720569753e+1,
    -0.4957589496572501915214079952,
    0.1664377182454986536961530415e+1,
    -0.3503288487499736816886487290,
    0.3341791187130174790297318841,
    0.8192320648511571246570742613e-1,
    -0.2235530786388629525884427845e-1,
]
_DOP853_D = np.zeros((4, 16))
_DOP853_D[0, [0, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15]] = [
    -0.84289382761090128651353491142e+1,
    0.56671495351937776962531783590,
    -0.30689499459498916912797304727e+1,
    0.23846676565120698287728149680e+1,
    0.21170345824450282767155149946e+1,
    -0.87139158377797299206789907490,
    0.22404374302607882758541771650e+1,
    0.63157877876946881815570249290,
    -0.88990336451333310820698117400e-1,
    0.18148505520854727256656404962e+2,
    -0.91946323924783554000451984436e+1,
    -0.44360363875948939664310572000e+1,
]
_DOP853_D[1, [0, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15]] = [
    0.10427508642579134603413151009e+2,
    0.24228349177525818288430175319e+3,
    0.16520045171727028198505394887e+3,
    -0.37454675472269020279518312152e+3,
    -0.22113666853125306036270938578e+2,
    0.77334326684722638389603898808e+1,
    -0.30674084731089398182061213626e+2,
    -0.93321305264302278729567221706e+1,
    0.15697238121770843886131091075e+2,
    -0.31139403219565177677282850411e+2,
    -0.93529243588444783865713862664e+1,
    0.35816841486394083752465898540e+2,
]
_DOP853_D[2, [0, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15]] = [
    0.19985053242002433820987653617e+2,
    -0.38703730874935176555105901742e+3,
    -0.18917813819516756882830838328e+3,
    0.52780815920542364900561016686e+3,
    -0.11573902539959630126141871134e+2,
    0.68812326946963000169666922661e+1,
    -0.10006050966910838403183860980e+1,
    0.77771377980534432092869265740,
    -0.27782057523535084065932004339e+1,
    -0.60196695231264120758267380846e+2,
    0.84320405506677161018159903784e+2,
    0.11992291136182789328035130030e+2,
]
_DOP853_D[3, [0, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15]] = [
    -0.25693933462703749003312586129e+2,
    -0.15418974869023643374053993627e+3,
    -0.23152937917604549567536039109e+3,
    0.35763911791061412378285349910e+3,
    0.93405324183624310003907691704e+2,
    -0.37458323136451633156875139351e+2,
    0.10409964950896230045147246184e+3,
    0.29840293426660503123344363579e+2,
    -0.43533456590011143754432175058e+2,
    0.96324553959188282948394950600e+2,
    -0.39177261675615439165231486172e+2,
    -0.14972683625798562581422125276e+3,
]


def _dop853() -> Tableau:
    s = 12
    b = _DOP853_A[s, :s].copy()
    e5 = _DOP853_E5
    e3 = np.zeros(s + 1)
    e3[:s] = b
    for i, v in _DOP853_E3_BHAT.items():
        e3[i] -= v
    # Dense output (HNW I, Sec. II.10 / Hairer's CONTD8): with F_j = h sum_i W[j, i] k_i,
    # y(theta) - y_n = th*(F0 + (1-th)*(F1 + th*(F2 + (1-th)*(F3 + th*(F4 + (1-th)*(F5 + th*F6))))))
    # where F0 = y_{n+1} - y_n, F1 = h f_n - F0, F2 = 2 F0 - h (f_{n+1} + f_n), F3.. = h D k.
    # Expanded here into monomials in theta (exact algebra, no new information).
    n = 16
    W = np.zeros((7, n))
    W[0, :s] = b
    W[1, 0] = 1.0
    W[1, :s] -= b
    W[2, :s] = 2.0 * b
    W[2, 0] -= 1.0
    W[2, s] -= 1.0
    W[3:] = _DOP853_D
    x = np.polynomial.Polynomial([0.0, 1.0])
    one_minus_x = 1.0 - x
    P = np.zeros((n, 7))
    for i in range(n):
        p = np.polynomial.Polynomial([W[6, i]])
        for j, factor in ((5, x), (4, one_minus_x), (3, x), (2, one_minus_x), (1, x), (0, one_minus_x)):
            p = W[j, i] + factor * p
        p = x * p
        coef = np.zeros(8)
        coef[:p.coef.size] = p.coef
        P[i] = coef[1:]
    return Tableau(name="dop853", title="DOP853 (Hairer, Norsett & Wanner 1993)", order=8, error_order=7,
                   n_stages=s, A=_DOP853_A, c=_DOP853_C, b=b, e=_DOP853_E5.copy(), e_aux=e3,
                   error_kind=ERROR_DOP853, P=P, dense_order=7, fsal=False)


# ---------------------------------------------------------------------------------------
# RK8(7)13M (Prince & Dormand 1981)
# ---------------------------------------------------------------------------------------
_RK87_C = np.array([0.0, 1 / 18, 1 / 12, 1 / 8, 5 / 16, 3 / 8, 59 / 400, 93 / 200,
                    5490023248 / 9719169821, 13 / 20, 1201146811 / 1299019798, 1.0, 1.0])
_RK87_A_ROWS = {
    1: {0: 1 / 18},
    2: {0: 1 / 48, 1: 1 / 16},
    3: {0: 1 / 32, 2: 3 / 32},
    4: {0: 5 / 16, 2: -75 / 64, 3: 75 / 64},
    5: {0: 3 / 80, 3: 3 / 16, 4: 3 / 20},
    6: {0: 29443841 / 614563906, 3: 77736538 / 692538347, 4: -28693883 / 1125000000,
        5: 23124283 / 1800000000},
    7: {0: 16016141 / 946692911, 3: 61564180 / 158732637, 4: 22789713 / 633445777,
        5: 545815736 / 2771057229, 6: -180193667 / 1043307555},
    8: {0: 39632708 / 573591083, 3: -433636366 / 683701615, 4: -421739975 / 2616292301,
        5: 100302831 / 723423059, 6: 790204164 / 839813087, 7: 800635310 / 3783071287},
    9: {0: 246121993 / 1340847787, 3: -37695042795 / 15268766246, 4: -309121744 / 1061227803,
        5: -12992083 / 490766935, 6: 6005943493 / 2108947869, 7: 393006217 / 1396673457,
        8: 123872331 / 1001029789},
    10: {0: -1028468189 / 846180014, 3: 8478235783 / 508512852, 4: 1311729495 / 1432422823,
         5: -10304129995 / 1701304382, 6: -48777925059 / 3047939560, 7: 15336726248 / 1032824649,
         8: -45442868181 / 3398467696, 9: 3065993473 / 597172653},
    11: {0: 185892177 / 718116043, 3: -3185094517 / 667107341, 4: -477755414 / 1098053517,
         5: -703635378 / 230739211, 6: 5731566787 / 1027545527, 7: 5232866602 / 850066563,
         8: -4093664535 / 808688257, 9: 3962137247 / 1805957418, 10: 65686358 / 487910083},
    12: {0: 403863854 / 491063109, 3: -5068492393 / 434740067, 4: -411421997 / 543043805,
         5: 652783627 / 914296604, 6: 11173962825 / 925320556, 7: -13158990841 / 6184727034,
         8: 3936647629 / 1978049680, 9: -160528059 / 685178525, 10: 248638103 / 1413531060},
}
_RK87_B = {0: 14005451 / 335480064, 5: -59238493 / 1068277825, 6: 181606767 / 758867731,
           7: 561292985 / 797845732, 8: -1041891430 / 1371343529, 9: 760417239 / 1151165299,
           10: 118820643 / 751138087, 11: -528747749 / 2220607170, 12: 1 / 4}
_RK87_BHAT = {0: 13451932 / 455176623, 5: -808719846 / 976000145, 6: 1757004468 / 5645159321,
              7: 656045339 / 265891186, 8: -3867574721 / 1518517206, 9: 465885868 / 322736535,
              10: 53011238 / 667516719, 11: 2 / 45}

# Continuous extension (derived here, see module docstring): extra stage 14 at theta = 0.65,
# its row over stages 0..13 (stage 13 = f(t_n+h, y_{n+1})), then the weight polynomials.
_RK87_DENSE_C = 0.65
_RK87_DENSE_ROW = dict([
    (0, 0.05354799646509049),
    (5, 0.08078494372559994),
    (6, 0.19877385927295896),
    (7, 0.49252307311163235),
    (8, -0.47135066459895203),
    (9, 0.308956950151871),
    (10, -0.016950573594438634),
    (11, -0.1109658418978298),
    (12, 0.18353559743196474),
    (13, -0.06885534006790578),
])
_RK87_DENSE_P = np.zeros((15, 6))
_RK87_DENSE_P[0, 0] = 1.0
_RK87_DENSE_P[0, 1:] = [-6.461276812495831, 18.541766537998825, -26.83804244927504, 19.146377481386093, -5.347077266472518]
_RK87_DENSE_P[5, 1:] = [-4.4403427331417085, 32.14496840464526, -77.12242350610204, 75.2385987591679, -25.87625325318061]
_RK87_DENSE_P[6, 1:] = [9.79157256522111, -40.945792861183286, 70.01656328219146, -54.92616139851046, 16.303131219482424]
_RK87_DENSE_P[7, 1:] = [-0.5022217385986627, 6.137100403464167, -4.131691196756687, -3.917967846064934, 3.1182910473592926]
_RK87_DENSE_P[8, 1:] = [-1.6436624539386404, 2.232421670923253, 3.3321415511631756, -11.345455982228426, 6.664795600266157]
_RK87_DENSE_P[9, 1:] = [-7.878867312060616, 55.53525993942917, -129.11932417121602, 127.11171595792176, -44.988221383151796]
_RK87_DENSE_P[10, 1:] = [-2.613586639932671, 19.012664224460263, -47.93051854445891, 50.22651587032919, -18.536887427887635]
_RK87_DENSE_P[11, 1:] = [5.831969782587283, -39.12790609245124, 92.6447524138838, -92.66232291327952, 33.075397270506954]
_RK87_DENSE_P[12, 1:] = [-4.361957480679109, 31.65866992433471, -80.02704971964428, 84.02591958899964, -31.045582313011174]
_RK87_DENSE_P[13, 1:] = [-0.08619650372051524, -2.758689974080978, 13.707052441147447, -19.79324894516991, 8.931082981823984]
_RK87_DENSE_P[14, 1:] = [12.364569326759344, -82.43046217754309, 185.46853989906563, -173.1039705725395, 57.70132352425764]


def _rk87() -> Tableau:
    s = 13
    n = s + 2
    A = np.zeros((n, n))
    for i, row in _RK87_A_ROWS.items():
        for j, v in row.items():
            A[i, j] = v
    b = np.zeros(s)
    bhat = np.zeros(s)
    for j, v in _RK87_B.items():
        b[j] = v
    for j, v in _RK87_BHAT.items():
        bhat[j] = v
    A[s, :s] = b
    for j, v in _RK87_DENSE_ROW.items():
        A[s + 1, j] = v
    c = np.concatenate([_RK87_C, [1.0, _RK87_DENSE_C]])
    e = np.zeros(s + 1)
    e[:s] = b - bhat
    return Tableau(name="rk87", title="RK8(7)13M (Prince & Dormand 1981)", order=8, error_order=7,
                   n_stages=s, A=A, c=c, b=b, e=e, e_aux=np.zeros(s + 1), error_kind=ERROR_STANDARD,
                   P=_RK87_DENSE_P, dense_order=6, fsal=False)


# ---------------------------------------------------------------------------------------
# RK5(4)7M (Dormand & Prince 1980) with Shampine's (1986) dense output
# ---------------------------------------------------------------------------------------

def _rk54() -> Tableau:
    s = 6
    A = np.zeros((s + 1, s + 1))
    A[1, :1] = [1 / 5]
    A[2, :2] = [3 / 40, 9 / 40]
    A[3, :3] = [44 / 45, -56 / 15, 32 / 9]
    A[4, :4] = [19372 / 6561, -25360 / 2187, 64448 / 6561, -212 / 729]
    A[5, :5] = [9017 / 3168, -355 / 33, 46732 / 5247, 49 / 176, -5103 / 18656]
    b = np.array([35 / 384, 0.0, 500 / 1113, 125 / 192, -2187 / 6784, 11 / 84])
    A[s, :s] = b
    c = np.array([0.0, 1 / 5, 3 / 10, 4 / 5, 8 / 9, 1.0, 1.0])
    # b - bhat (bhat includes the FSAL stage f(t_n+h, y_{n+1}) with weight 1/40)
    e = np.array([-71 / 57600, 0.0, 71 / 16695, -71 / 1920, 17253 / 339200, -22 / 525, 1 / 40])
    P = np.array([
        [1.0, -8048581381 / 2820520608, 8663915743 / 2820520608, -12715105075 / 11282082432],
        [0.0, 0.0, 0.0, 0.0],
        [0.0, 131558114200 / 32700410799, -68118460800 / 10900136933, 87487479700 / 32700410799],
        [0.0, -1754552775 / 470086768, 14199869525 / 1410260304, -10690763975 / 1880347072],
        [0.0, 127303824393 / 49829197408, -318862633887 / 49829197408, 701980252875 / 199316789632],
        [0.0, -282668133 / 205662961, 2019193451 / 616988883, -1453857185 / 822651844],
        [0.0, 40617522 / 29380423, -110615467 / 29380423, 69997945 / 29380423],
    ])
    return Tableau(name="rk54", title="RK5(4)7M (Dormand & Prince 1980), dense output Shampine 1986",
                   order=5, error_order=4, n_stages=s, A=A, c=c, b=b, e=e, e_aux=np.zeros(s + 1),
                   error_kind=ERROR_STANDARD, P=P, dense_order=4, fsal=True)


def rounding_residuals(tab: Tableau) -> np.ndarray:
    """b_lo (s,): the rounding residual of the stored (double) weights of ``tab``, as a
    small correction the stepping loop adds to every step.

    In double precision the weights and the rows of ``A`` carry rounding errors of
    ~1e-16 relative (up to ~2e-15 on DOP853 rows with coefficients of size 40), so the
    first two order conditions, ``sum_i b_i = 1`` and ``sum_i b_i c~_i = 1/2`` with the
    effective nodes ``c~_i = sum_j a_ij`` of the stored rows, hold only to that level.
    The same residual acts in every step; its global effect is a drift proportional to
    the step size (the order-2 residual gives a global error of order ``eps h``),
    measured as ~1.2e-5 m after 7 days of two-body MEO with 350-450 s steps even in
    80-bit arithmetic, where the truncation error is 1e-6 - 4e-6 m.  The residual is
    the low part of the weights as unevaluated sums of two doubles (common practice in
    double-double arithmetic; T. J. Dekker, "A floating-point technique for extending
    the available precision", Numer. Math. 18, 224-242, 1971), kept for the two
    conditions that matter at these step sizes:

    * ``sum b = 1`` needs no residual: the loop forms the increment as
      ``h k_0 + h sum_j b_j (k_j - k_0)`` (``stepper._rk_solution``);
    * ``b_lo`` is zero except on the last stage with the largest effective node
      (``c = 1`` in all three methods), where ``b_lo c~ = 1/2 - sum_i b_i c~_i`` in exact
      (rational) arithmetic of the stored doubles, so that ``sum (b + b_lo) c~ = 1/2``.
      Using the stored rows' ``c~`` (not the nodes ``c``) makes this one residual cover
      the rounding of ``A`` too: for an autonomous problem the stages see ``c~``.

    Higher conditions keep residuals of ~1e-16 whose global effect is of order
    ``eps h^2`` and below (6e-9 m in the same 80-bit test at 200 s steps).
    """
    from fractions import Fraction

    s = tab.n_stages
    ct = [sum((Fraction(float(a)) for a in tab.A[j, :j]), Fraction(0)) for j in range(s)]
    r2 = Fraction(1, 2) - sum((Fraction(float(x)) * y for x, y in zip(tab.b, ct)), Fraction(0))
    j_lo = max(range(1, s), key=lambda j: (ct[j], j))
    b_lo = np.zeros(s)
    b_lo[j_lo] = float(r2 / ct[j_lo])
    return b_lo


METHODS: dict[str, Tableau] = {t.name: t for t in (_dop853(), _rk87(), _rk54())}
"""Config name -> tableau."""


def get_tableau(name: str) -> Tableau:
    """The tableau called ``name``; unknown names list the known ones."""
    try:
        return METHODS[name.lower()]
    except KeyError:
        raise ValueError(f"unknown integration method {name!r}; known methods: {', '.join(sorted(METHODS))}") from None
